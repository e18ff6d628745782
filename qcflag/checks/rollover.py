"""Digit rollover (Argo real-time test 12)."""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np

from qcflag.checks._ragged import grade_levels, neighbour_map, usable
from qcflag.checks.base import CheckResult

if TYPE_CHECKING:
    from numpy.typing import NDArray

    from qcflag.profiles import ProfileBatch

__all__ = ["digit_rollover"]


def digit_rollover(
    batch: ProfileBatch,
    *,
    variable: str,
    limit: float,
    exclude: NDArray[np.bool_] | None = None,
) -> CheckResult:
    """Grade a level whose value jumps from the usable level above it by more than `limit`.

    Argo test 12 compares adjacent levels (TEMP > 10 degC, PSAL > 5; ARGO-QC §2.1.2 via
    ../shared/reference/qc-standards.md §1.3, tag M). Of the pair, qcflag grades the deeper
    level: the sensor's stored digits roll over going down the profile, so the value after
    the jump is the suspect one. Levels already graded bad are skipped as neighbours, so a
    spike removed by the spike test does not make its deeper neighbour fail here.

    Parameters
    ----------
    batch : ProfileBatch
        Profiles to check.
    variable : {"temperature", "salinity"}
        Variable to check.
    limit : float
        Largest allowed absolute difference, in the variable's units ("exceeds" = strictly
        greater).
    exclude : ndarray of bool, optional
        Levels already graded bad.

    Returns
    -------
    CheckResult
        Statistic: absolute difference from the usable level above, in the variable's units;
        NaN at the first usable level of a profile.
    """
    v = batch.values(variable)
    stat = np.empty(v.size)
    grade = np.empty(v.size, dtype=np.int8)

    def blockwise(levels: slice | NDArray[np.int64], v1: NDArray[np.float64],
                  _: NDArray[np.float64]) -> None:
        st = np.subtract(v[levels], v1)
        np.abs(st, out=st)
        stat[levels] = st
        grade[levels] = grade_levels(st == st, st > limit)

    neighbour_map(batch, v, usable(v, exclude), blockwise, after=False)
    return CheckResult(stat, grade)
