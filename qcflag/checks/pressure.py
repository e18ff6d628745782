"""Pressure increasing (Argo real-time test 8)."""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np

from qcflag.checks._ragged import usable
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
    The running maximum per profile is computed without a loop: pressures are ranked
    (exact integer keys), the key is offset by ``profile * n_ranks`` so that profiles never
    mix, and :func:`numpy.maximum.accumulate` runs over the whole batch.
    """
    p = batch.pressure
    ok = usable(p, exclude)
    uniq, rank = np.unique(p[ok], return_inverse=True)
    n_rank = max(int(uniq.size), 1)
    key = batch.profile_index * n_rank - 1  # unusable levels: below every key of the profile
    key[ok] = batch.profile_index[ok] * n_rank + rank.ravel()
    run = np.maximum.accumulate(key) if key.size else key
    prev = np.empty_like(run)
    if run.size:
        prev[0] = -1
        prev[1:] = run[:-1]
    prev_rank = prev - batch.profile_index * n_rank
    has_prev = (prev_rank >= 0) & ~batch.first_level
    stat = np.full(p.size, np.nan)
    sel = has_prev & np.isfinite(p)
    stat[sel] = uniq[prev_rank[sel]] - p[sel]
    fail = sel & (stat >= 0)
    grade = np.where(fail, 4, 1).astype(np.int8)
    grade[np.isnan(p)] = 0
    out = {"pressure": CheckResult(stat, grade)}
    for name in ("temperature", "salinity"):
        g = grade.copy()
        g[np.isnan(batch.values(name))] = 0
        out[name] = CheckResult(stat.copy(), g)
    return out
