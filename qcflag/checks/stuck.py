"""Stuck value (Argo real-time test 13) and flat line (runs of repeated values)."""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np

from qcflag.checks._ragged import (
    broadcast_profiles,
    gather,
    prev_valid_index,
    profile_reduce,
    usable,
)
from qcflag.checks.base import CheckResult

if TYPE_CHECKING:
    from numpy.typing import NDArray

    from qcflag.profiles import ProfileBatch

__all__ = ["flat_line", "stuck_value"]


def stuck_value(
    batch: ProfileBatch,
    *,
    variable: str,
    min_levels: int = 2,
    exclude: NDArray[np.bool_] | None = None,
) -> CheckResult:
    """Grade every level of a profile whose values of `variable` are all identical (test 13).

    Parameters
    ----------
    batch : ProfileBatch
        Profiles to check.
    variable : {"temperature", "salinity"}
        Variable to check.
    min_levels : int, default=2
        Profiles with fewer usable levels are not judged (one value is trivially "all
        identical").
    exclude : ndarray of bool, optional
        Levels already graded bad; they do not count.

    Returns
    -------
    CheckResult
        Grade 4 on every level with a value in a stuck profile (ARGO-QC §2.1.2 test 13 via
        ../shared/reference/qc-standards.md §1.3, tag M). Statistic: the profile's range
        (max - min of usable values) in the variable's units, broadcast to its levels; NaN
        for profiles not judged.
    """
    v = batch.values(variable)
    ok = usable(v, exclude)
    spread = profile_reduce(batch, v, ok, "max") - profile_reduce(batch, v, ok, "min")
    enough = profile_reduce(batch, v, ok, "count") >= min_levels
    spread[~enough] = np.nan
    stat = broadcast_profiles(batch, spread)
    grade = np.where(stat == 0, 4, 1).astype(np.int8)
    grade[np.isnan(stat) | np.isnan(v)] = 0
    return CheckResult(stat, grade)


def flat_line(
    batch: ProfileBatch,
    *,
    variable: str,
    eps: float = 0.0,
    suspect_count: int = 10,
    fail_count: int = 20,
    exclude: NDArray[np.bool_] | None = None,
) -> CheckResult:
    """Grade runs of repeated values within a profile (QARTOD-style flat line).

    Consecutive usable levels belong to one run while each differs from the one above by
    at most `eps`. A run of more than `suspect_count` + 1 levels is graded 3, of more than
    `fail_count` + 1 levels 4 — the counts are those of the QARTOD rule "Tn - Tn-i < EPS for
    all i = 1..REP_CNT" (QARTOD glider T/S manual, DOI 10.25607/OBP-1465, via
    ../shared/reference/qc-standards.md §4.3 and worked example E20: 11 identical values ->
    3, 21 -> 4).

    Parameters
    ----------
    batch : ProfileBatch
        Profiles to check.
    variable : {"temperature", "salinity"}
        Variable to check.
    eps : float, default=0.0
        Largest difference between adjacent levels that still counts as a repeat, in the
        variable's units; 0 means exactly repeated values.
    suspect_count, fail_count : int, default=10, 20
        REP_CNT_SUSPECT and REP_CNT_FAIL: a run of at least ``count + 1`` levels is graded 3
        or 4.
    exclude : ndarray of bool, optional
        Levels already graded bad; they are skipped (a run continues across them).

    Returns
    -------
    CheckResult
        Statistic: length of the run the level belongs to (1 for a level unlike both
        neighbours); NaN where the value is missing.

    Notes
    -----
    QARTOD's streaming form flags only the value that completes the count. A whole profile
    is seen at once, so here every level of a long run is graded, including the first: all
    of its members are equally indistinguishable from a stuck sensor. With `eps` > 0 the
    run chains adjacent differences, which can drift further than `eps` over a long run.
    """
    v = batch.values(variable)
    ok = usable(v, exclude)
    # compact the usable levels so that a run continues across skipped levels
    prev = gather(v, prev_valid_index(batch, ok))
    same = ok & (np.abs(v - prev) <= eps)
    idx = np.flatnonzero(ok)
    if idx.size:
        sub_pi = batch.profile_index[idx]
        first = np.ones(idx.size, dtype=bool)
        first[1:] = sub_pi[1:] != sub_pi[:-1]
        starts = ~same[idx] | first
        run_id = np.cumsum(starts) - 1
        length = np.bincount(run_id)[run_id]
    else:
        length = np.zeros(0, dtype=np.int64)
    stat = np.full(v.size, np.nan)
    stat[idx] = length
    grade = np.ones(v.size, dtype=np.int8)
    grade[stat >= suspect_count + 1] = 3
    grade[stat >= fail_count + 1] = 4
    grade[np.isnan(stat)] = 0
    return CheckResult(stat, grade)

