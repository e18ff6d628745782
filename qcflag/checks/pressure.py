"""Pressure increasing (Argo real-time test 8)."""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np

from qcflag.checks._ragged import grade_levels, neighbour_map, sorted_unique, usable
from qcflag.checks.base import CheckResult

if TYPE_CHECKING:
    from numpy.typing import NDArray

    from qcflag.profiles import ProfileBatch

__all__ = ["pressure_increasing"]


def pressure_increasing(
    batch: ProfileBatch,
    *,
    variable: str = "pressure",
    exclude: NDArray[np.bool_] | None = None,
) -> dict[str, CheckResult]:
    """Grade levels whose pressure does not exceed every pressure above them (Argo test 8).

    A level fails when its pressure is less than or equal to the largest pressure of the
    levels before it in the same profile. This gives both published cases at once: in a run
    of equal pressures all but the first fail, and in a reversed section every reversed
    level fails (ARGO-QC §2.1.2 test 8, via ../shared/reference/qc-standards.md §1.3, tag M).

    Parameters
    ----------
    batch : ProfileBatch
        Profiles to check.
    variable : {"pressure"}
        Always pressure; accepted for the common check signature.
    exclude : ndarray of bool, optional
        Levels already graded bad; they do not raise the running maximum.

    Returns
    -------
    dict of str to CheckResult
        For ``pressure``, ``temperature`` and ``salinity``: grade 4 at failing levels, 1
        elsewhere, 0 where the value (or pressure) is missing. Statistic: running maximum
        pressure above the level minus its pressure, dbar (>= 0 fails; NaN at the first
        usable level of a profile).

    Notes
    -----
    No loop: in profiles whose usable pressures all increase, the running maximum is the
    previous usable pressure. Only the other profiles go through the exact ranked running
    maximum of :func:`_running_max_before`.
    """
    p = batch.pressure
    ok = usable(p, exclude)
    # Fast path: where every usable pressure exceeds the previous usable one, the running
    # maximum above a level is simply the previous usable pressure.
    stat = np.empty(p.size)

    def blockwise(levels: slice | NDArray[np.int64], p1: NDArray[np.float64],
                  _: NDArray[np.float64]) -> None:
        stat[levels] = p1 - p[levels]  # previous usable pressure - pressure

    neighbour_map(batch, p, ok, blockwise, after=False)
    fail = stat >= 0
    not_rising = np.flatnonzero(fail & ok)
    if not_rising.size:
        irregular = sorted_unique(np.searchsorted(batch.offsets, not_rising, side="right") - 1)
        lv, above = _running_max_before(batch, p, ok, irregular)
        stat[lv] = above - p[lv]
        np.greater_equal(stat, 0, out=fail)
    grade = grade_levels(p == p, fail)  # fail is False where stat (or p) is NaN
    out = {"pressure": CheckResult(stat, grade)}
    for name in ("temperature", "salinity"):
        v = batch.values(name)
        out[name] = CheckResult(stat.copy(), grade * (v == v).view(np.int8))
    return out


def _running_max_before(batch: ProfileBatch, p: NDArray[np.float64], ok: NDArray[np.bool_],
                        profiles: NDArray[np.int64]) -> tuple[NDArray[np.int64],
                                                              NDArray[np.float64]]:
    """Largest usable pressure above each level of `profiles` in its profile (NaN if none).

    A segmented running maximum by doubling: after the pass with step ``s`` each level
    holds the maximum of the usable pressures of the ``2 s`` levels ending at it in its
    profile, so ``log2(longest profile)`` vectorised passes suffice (maxima are exact).
    Returns the levels of `profiles` (in order) and the maxima.
    """
    counts = batch.counts[profiles]
    depth = np.arange(int(counts.sum()), dtype=np.int64)
    depth -= np.repeat(np.cumsum(counts) - counts, counts)  # level number in its profile
    sel = depth + np.repeat(batch.offsets[:-1][profiles], counts)
    run = np.where(ok[sel], p[sel], -np.inf)
    step = 1
    longest = int(depth.max(initial=0)) + 1
    while step < longest:
        # overlapping input and output: numpy reads the inputs as they were before the pass
        np.maximum(run[step:], run[:-step], out=run[step:], where=depth[step:] >= step)
        step *= 2
    out = np.full(sel.size, np.nan)
    out[1:] = run[:-1]  # the maximum above a level: up to the level before it
    out[depth == 0] = np.nan
    out[np.isneginf(out)] = np.nan
    return sel, out
