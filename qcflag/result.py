"""The result of flagging a batch: graded flags, confidence, reasons, per variable."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import TYPE_CHECKING

import numpy as np

from qcflag.schemes import encode

if TYPE_CHECKING:
    import pandas as pd
    from numpy.typing import NDArray

    from qcflag.checks.base import CheckTable

__all__ = ["FlagResult", "VariableFlags"]


@dataclass
class VariableFlags:
    """Automatic flags of one variable over a batch.

    Parameters
    ----------
    grade : ndarray of int8, shape (n_levels,)
        Ordinal grade 1-4 chosen by the combiner; 0 where the level carries a non-ordinal
        state instead (e.g. the value is missing).
    state : ndarray of int8, shape (n_levels,)
        :class:`qcflag.schemes.State`; ``ASSESSED`` where `grade` is set.
    confidence : ndarray of float64, shape (n_levels,)
        Probability the combiner gives to the chosen grade, in [0, 1] (1 for forced grades;
        NaN where no grade was assigned).
    reasons : ndarray of object (str), shape (n_levels,)
        ``;``-separated names of the checks that fired and the features that pushed the
        grade most; empty string where nothing did.
    rule_grade : ndarray of int8, shape (n_levels,)
        Worst grade given by the rules alone.
    forced : ndarray of bool, shape (n_levels,)
        True where a physically impossible value forced the grade.
    proba : ndarray of float64, shape (n_levels, 4), optional
        Fused probability of grades 1-4 (rows sum to 1); None for rules-only runs.
    """

    grade: NDArray[np.int8]
    state: NDArray[np.int8]
    confidence: NDArray[np.float64]
    reasons: NDArray[np.object_]
    rule_grade: NDArray[np.int8]
    forced: NDArray[np.bool_]
    proba: NDArray[np.float64] | None = None

    def codes(self, scheme: str) -> NDArray[np.int8]:
        """Return the flags as stored codes of `scheme` (see :func:`qcflag.schemes.encode`)."""
        return encode(self.grade, self.state, scheme)


@dataclass
class FlagResult:
    """Everything qcflag concluded about one batch.

    Parameters
    ----------
    variables : dict of str to VariableFlags
        ``"temperature"``, ``"salinity"`` and, where checked, ``"pressure"``.
    checks : CheckTable
        The rule results the flags were built from.
    profiles : pandas.DataFrame
        One row per profile: ``<var>_percent_good`` and ``<var>_profile_grade`` (Argo
        reference table 2a letters) for each variable.
    scheme : str
        Output flag scheme.
    model_card : dict
        Summary of the model used (empty for rules-only runs).
    """

    variables: dict[str, VariableFlags]
    checks: CheckTable
    profiles: pd.DataFrame
    scheme: str = "argo"
    model_card: dict[str, object] = field(default_factory=dict)

    def __getitem__(self, variable: str) -> VariableFlags:
        return self.variables[variable]
