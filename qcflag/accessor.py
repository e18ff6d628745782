"""The ``ds.qcflag`` accessor: qcflag as one step of an xarray processing chain.

Importing :mod:`qcflag` registers it. Following xarray's accessor conventions the accessor
only stores the dataset; every method forwards to :mod:`qcflag.chain` and returns a new
dataset, never modifying the one it was called on.
"""

from __future__ import annotations

from typing import Any

import xarray as xr

__all__ = ["QCFlagAccessor"]


@xr.register_dataset_accessor("qcflag")
class QCFlagAccessor:
    """Quality-flag methods for profile datasets (``ds.qcflag``).

    Parameters
    ----------
    ds : xarray.Dataset
        A CF DSG or Argo-format profile dataset.

    Examples
    --------
    >>> import qcflag                                  # doctest: +SKIP
    >>> flagged = ds.qcflag.flag(rules="coastal")      # doctest: +SKIP
    >>> checks = ds.qcflag.check()                     # doctest: +SKIP
    """

    def __init__(self, ds: xr.Dataset) -> None:
        self._ds = ds  # nothing else happens here

    def flag(self, model: Any = None, rules: Any = None, **options: Any) -> xr.Dataset:
        """Flag every level; see :func:`qcflag.chain.flag_dataset`.

        Parameters
        ----------
        model : QCModel or path-like, optional
            Fitted model or its file; None gives rules-only flags.
        rules : str, path-like or RuleSet, optional
            Rule set (default: the standard set).
        **options
            Other keyword arguments of :func:`qcflag.chain.flag_dataset`.

        Returns
        -------
        xarray.Dataset
            A new dataset with the flag variables added.
        """
        from qcflag.chain import flag_dataset

        return flag_dataset(self._ds, model, rules, **options)

    def check(self, rules: Any = None, **options: Any) -> xr.Dataset:
        """Add every check's statistic and grade; see :func:`qcflag.chain.check_dataset`.

        Parameters
        ----------
        rules : str, path-like or RuleSet, optional
            Rule set (default: the standard set).
        **options
            Other keyword arguments of :func:`qcflag.chain.check_dataset`.

        Returns
        -------
        xarray.Dataset
            A new dataset with the check variables added.
        """
        from qcflag.chain import check_dataset

        return check_dataset(self._ds, rules, **options)
