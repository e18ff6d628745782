"""Pressure increasing (Argo real-time test 8)."""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np

from qcflag.checks._ragged import broadcast_profiles, grade_levels, prev_values, usable
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
    stat = prev_values(batch, p, ok)
    np.subtract(stat, p, out=stat)  # previous usable pressure - pressure
    fail = stat >= 0
    not_rising = np.flatnonzero(fail & ok)
    if not_rising.size:
        irregular = np.zeros(batch.n_profiles, dtype=bool)
        irregular[np.searchsorted(batch.offsets, not_rising, side="right") - 1] = True
        lv = broadcast_profiles(batch, irregular)
        stat[lv] = _running_max_before(batch, p, ok, lv) - p[lv]
        np.greater_equal(stat, 0, out=fail)
    grade = grade_levels(p == p, fail)  # fail is False where stat (or p) is NaN
    out = {"pressure": CheckResult(stat, grade)}
    for name in ("temperature", "salinity"):
        v = batch.values(name)
        out[name] = CheckResult(stat.copy(), grade * (v == v).view(np.int8))
    return out


def _running_max_before(batch: ProfileBatch, p: NDArray[np.float64], ok: NDArray[np.bool_],
                        levels: NDArray[np.bool_]) -> NDArray[np.float64]:
    """Largest usable pressure above each selected level in its profile (NaN if none).

    Pressures are ranked (exact integer keys), the key is offset by ``profile * n_ranks``
    so that profiles never mix, and :func:`numpy.maximum.accumulate` runs over all of them.
    `levels` must select whole profiles.
    """
    pi = batch.profile_index[levels]
    sub_ok = ok[levels]
    uniq, rank = np.unique(p[levels][sub_ok], return_inverse=True)
    n_rank = max(int(uniq.size), 1)
    key = pi * n_rank - 1  # unusable levels: below every key of their profile
    key[sub_ok] = pi[sub_ok] * n_rank + rank.ravel()
    run = np.maximum.accumulate(key)
    before = np.empty_like(run)
    before[0] = -1
    before[1:] = run[:-1]
    before_rank = before - pi * n_rank
    out = np.full(pi.size, np.nan)
    has = before_rank >= 0
    out[has] = uniq[before_rank[has]]
    return out
