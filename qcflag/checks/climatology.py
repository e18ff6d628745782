"""Climatology check: standardized anomaly from the packaged annual climatology.

Each level's temperature or salinity is compared with the packaged annual-mean climatology
interpolated to the profile's position and the level's depth (see
:mod:`qcflag.reference.fields`), scaled by the packaged variability *estimate* (see
:mod:`qcflag.reference.build`; it is derived from the mean field, not a measured standard
deviation). The statistic is the signed standardized anomaly ``z = (value - mean) / sd``.

The verdict follows QARTOD's climatology test, which only ever gives "suspect" and never
"fail" (../shared/reference/qc-standards.md §4.3): grade 3 where ``|z| > threshold``. The
default threshold is generous because the annual climatology does not resolve the seasonal
cycle or interannual change; a data centre should tune it on its own archive.

Automated flags assist expert quality control; they do not replace it.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np

from qcflag.checks.base import CheckResult

if TYPE_CHECKING:
    from qcflag.profiles import ProfileBatch
    from qcflag.reference.fields import ClimatologyAtLevels

__all__ = ["DEFAULT_THRESHOLD", "climatology_anomaly"]

DEFAULT_THRESHOLD = 5.0
"""Default limit on ``|z|`` (judgement; see the module docstring)."""


def climatology_anomaly(
    batch: ProfileBatch,
    *,
    variable: str,
    threshold: float = DEFAULT_THRESHOLD,
    reference: ClimatologyAtLevels | None = None,
) -> CheckResult:
    """Grade levels far from the climatology in units of its variability estimate.

    Parameters
    ----------
    batch : ProfileBatch
        Profiles to check.
    variable : {"temperature", "salinity"}
        Variable to check.
    threshold : float, default=DEFAULT_THRESHOLD
        A level with ``|z| > threshold`` gets grade 3 (probably bad); ``|z|`` equal to the
        threshold passes.
    reference : ClimatologyAtLevels, optional
        The climatology already interpolated to this batch
        (:func:`qcflag.reference.climatology_for`), to share between variables.

    Returns
    -------
    CheckResult
        Statistic: ``(value - mean) / sd``, unitless; NaN where the value is missing or
        there is no climatology (land, below the deepest climatology level, impossible
        position). Grade 0 there, else 1 or 3.

    Raises
    ------
    ValueError
        If `variable` is not temperature or salinity, or `threshold` is not positive.
    """
    if variable not in ("temperature", "salinity"):
        raise ValueError(f"climatology: variable must be temperature or salinity, not {variable!r}")
    if not threshold > 0:
        raise ValueError(f"climatology: threshold must be positive, got {threshold!r}")
    if reference is None:
        from qcflag.reference.fields import climatology_for

        reference = climatology_for(batch)
    value = batch.values(variable)
    z = (value - reference.mean(variable)) / reference.sd(variable)
    grade = np.where(np.abs(z) > threshold, 3, 1).astype(np.int8)
    grade[np.isnan(z)] = 0
    return CheckResult(z, grade)
