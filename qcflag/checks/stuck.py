"""Stuck value (Argo real-time test 13) and flat line (runs of repeated values)."""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np

from qcflag.checks._ragged import (
    _prev_fixes,
    broadcast_profiles,
    neighbour_map,
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
    lo, hi, count = profile_reduce(batch, v, ok, ("min", "max", "count"))
    spread = hi - lo
    spread[count < min_levels] = np.nan
    # grade per profile, then repeated to its levels (0 where the value is missing)
    per_profile = np.where(spread == 0, 4, 1).astype(np.int8)
    per_profile[np.isnan(spread)] = 0
    grade = broadcast_profiles(batch, per_profile)
    grade *= (v == v).view(np.int8)
    return CheckResult(broadcast_profiles(batch, spread), grade)


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
    same = np.empty(v.size, dtype=bool)

    def blockwise(levels: slice | NDArray[np.int64], v1: NDArray[np.float64],
                  _: NDArray[np.float64]) -> None:
        diff = np.subtract(v[levels], v1)  # v1: previous usable value (NaN at the first)
        np.abs(diff, out=diff)
        same[levels] = diff <= eps

    neighbour_map(batch, v, ok, blockwise, after=False)
    same &= ok  # usable levels that continue the run of the usable level above them
    # every usable level is a run of 1 unless it is in a run with a continuing level
    stat = np.full(v.size, np.nan)
    np.copyto(stat, 1.0, where=ok)
    grade = ok.astype(np.int8)
    cont = np.flatnonzero(same)
    if cont.size:
        # continuing levels with no usable level between them are in the same run
        skipped = np.flatnonzero(~ok)
        rank = cont - np.searchsorted(skipped, cont)  # usable levels above each
        new_run = np.ones(cont.size, dtype=bool)
        new_run[1:] = rank[1:] != rank[:-1] + 1
        run = np.cumsum(new_run) - 1
        length = np.bincount(run) + 1
        # a run's first level: the usable level above its first continuing level
        head = cont[new_run] - 1
        below_gap, above_gap = _prev_fixes(batch, ok)
        at = np.minimum(np.searchsorted(below_gap, head + 1), max(below_gap.size - 1, 0))
        hit = below_gap[at] == head + 1 if below_gap.size else np.zeros(head.size, bool)
        head[hit] = above_gap[at[hit]]
        run_grade = np.ones(length.size, dtype=np.int8)
        run_grade[length >= suspect_count + 1] = 3
        run_grade[length >= fail_count + 1] = 4
        stat[head] = length
        stat[cont] = length[run]
        grade[head] = run_grade
        grade[cont] = run_grade[run]
    return CheckResult(stat, grade)
