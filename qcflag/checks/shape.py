"""Profile-shape statistics that help learning; they give no verdict (grade 0 everywhere)."""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np

from qcflag.checks._ragged import (
    broadcast_profiles,
    moving_median_mad,
    neighbour_map,
    profile_reduce,
    usable,
)
from qcflag.checks.base import CheckResult

if TYPE_CHECKING:
    from numpy.typing import NDArray

    from qcflag.profiles import ProfileBatch

__all__ = ["MAD_TO_SD", "near_bottom", "near_surface", "robust_z", "second_difference"]

MAD_TO_SD = 1.4826
"""Scale from the median absolute deviation to a normal standard deviation (common practice)."""


def _no_verdict(stat: NDArray[np.float64]) -> CheckResult:
    return CheckResult(stat, np.zeros(stat.size, dtype=np.int8))


def robust_z(
    batch: ProfileBatch,
    *,
    variable: str,
    half_window: int = 5,
    min_scale: float = 0.01,
    exclude: NDArray[np.bool_] | None = None,
) -> CheckResult:
    """Moving-window robust z-score: ``(v - median) / max(1.4826 * MAD, min_scale)``.

    Parameters
    ----------
    batch : ProfileBatch
        Profiles to describe.
    variable : {"temperature", "salinity"}
        Variable to describe.
    half_window : int, default=5
        Levels on each side of the window (the level itself included).
    min_scale : float, default=0.01
        Floor of the scale, in the variable's units, so that a flat stretch does not divide
        by zero.
    exclude : ndarray of bool, optional
        Levels already graded bad; left out of every window.

    Returns
    -------
    CheckResult
        Statistic: the signed robust z-score (dimensionless); NaN where the value is
        missing or the window holds fewer than 3 usable levels. Grade 0.
    """
    v = batch.values(variable)
    med, mad, count = moving_median_mad(batch, v, usable(v, exclude), half_window)
    np.multiply(MAD_TO_SD, mad, out=mad)  # (v - med) / max(MAD_TO_SD * mad, min_scale)
    np.maximum(mad, min_scale, out=mad)
    stat = np.subtract(v, med, out=med)
    stat /= mad
    stat[count < 3] = np.nan
    return _no_verdict(stat)


def second_difference(
    batch: ProfileBatch,
    *,
    variable: str,
    exclude: NDArray[np.bool_] | None = None,
) -> CheckResult:
    """Second difference ``V1 - 2 V2 + V3`` over usable neighbours.

    Parameters
    ----------
    batch : ProfileBatch
        Profiles to describe.
    variable : {"temperature", "salinity"}
        Variable to describe.
    exclude : ndarray of bool, optional
        Levels already graded bad; not used as neighbours.

    Returns
    -------
    CheckResult
        Statistic in the variable's units (per level step, not per dbar); NaN at profile
        ends. Grade 0.
    """
    v = batch.values(variable)
    stat = np.empty(v.size)

    def blockwise(levels: slice | NDArray[np.int64], v1: NDArray[np.float64],
                  v3: NDArray[np.float64]) -> None:
        st = np.multiply(v[levels], 2)  # V1 - 2 V2 + V3, evaluated left to right as written
        np.subtract(v1, st, out=st)
        st += v3
        stat[levels] = st

    neighbour_map(batch, v, usable(v, exclude), blockwise)
    return _no_verdict(stat)


def _edge_distance(batch: ProfileBatch, variable: str, kind: str) -> NDArray[np.float64]:
    v = batch.values(variable)
    p = batch.pressure
    ok = np.isfinite(v)
    ok &= np.isfinite(p)
    stat = broadcast_profiles(batch, profile_reduce(batch, p, ok, kind))
    np.subtract(p, stat, out=stat)  # |p - edge|
    np.abs(stat, out=stat)
    if not ok.all():
        stat[~ok] = np.nan
    return stat


def near_surface(batch: ProfileBatch, *, variable: str) -> CheckResult:
    """Distance below the shallowest level of the profile with a value, dbar.

    Parameters
    ----------
    batch : ProfileBatch
        Profiles to describe.
    variable : {"temperature", "salinity"}
        Variable whose present levels define the profile's top.

    Returns
    -------
    CheckResult
        Statistic: 0 at the top level, growing downward; NaN where the value or pressure is
        missing. Grade 0.
    """
    return _no_verdict(_edge_distance(batch, variable, "min"))


def near_bottom(batch: ProfileBatch, *, variable: str) -> CheckResult:
    """Distance above the deepest level of the profile with a value, dbar.

    Parameters
    ----------
    batch : ProfileBatch
        Profiles to describe.
    variable : {"temperature", "salinity"}
        Variable whose present levels define the profile's bottom.

    Returns
    -------
    CheckResult
        Statistic: 0 at the bottom level; NaN where the value or pressure is missing.
        Grade 0.
    """
    return _no_verdict(_edge_distance(batch, variable, "max"))
