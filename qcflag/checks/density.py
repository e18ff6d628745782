"""Density inversion (Argo real-time test 14) with TEOS-10 through ``gsw``."""

from __future__ import annotations

from typing import TYPE_CHECKING

import gsw
import numpy as np

from qcflag.checks._ragged import next_valid_index, usable
from qcflag.checks.base import CheckResult

if TYPE_CHECKING:
    from numpy.typing import NDArray

    from qcflag.profiles import ProfileBatch

__all__ = ["density_inversion", "pair_density_drop"]


def pair_density_drop(
    SA_upper: NDArray[np.float64],
    CT_upper: NDArray[np.float64],
    p_upper: NDArray[np.float64],
    SA_lower: NDArray[np.float64],
    CT_lower: NDArray[np.float64],
    p_lower: NDArray[np.float64],
) -> NDArray[np.float64]:
    """Potential-density decrease from the upper to the lower level of each pair, kg/m3.

    Both levels' potential density is referenced to the pair's mid-point pressure
    ``(p_upper + p_lower) / 2`` with :func:`gsw.rho` (TEOS-10).

    Parameters
    ----------
    SA_upper, CT_upper, p_upper : ndarray of float64
        Absolute salinity (g/kg), Conservative Temperature (degC) and sea pressure (dbar) of
        the shallower level.
    SA_lower, CT_lower, p_lower : ndarray of float64
        The same for the deeper level.

    Returns
    -------
    ndarray of float64
        ``rho(upper) - rho(lower)`` at the mid-point pressure; positive is an inversion.
    """
    p_mid = (p_upper + p_lower) / 2
    return gsw.rho(SA_upper, CT_upper, p_mid) - gsw.rho(SA_lower, CT_lower, p_mid)


def density_inversion(
    batch: ProfileBatch,
    *,
    variable: str = "temperature",
    threshold: float = 0.03,
    exclude: NDArray[np.bool_] | None = None,
) -> dict[str, CheckResult]:
    """Grade both levels of an adjacent pair whose potential density decreases with depth.

    Absolute salinity ``SA = gsw.SA_from_SP(SP, p, lon, lat)`` and Conservative Temperature
    ``CT = gsw.CT_from_t(SA, t, p)`` are computed at each level's own pressure; each pair
    of adjacent usable levels is compared at its mid-point pressure
    (:func:`pair_density_drop`). Going down, a deeper level lighter than the one above by
    more than `threshold` is graded 4; going up, a shallower level denser than the one
    below by more than `threshold` is graded 4 (ARGO-QC §2.1.2 test 14 via
    ../shared/reference/qc-standards.md §1.3, tag M). With adjacent pairs the two sweeps
    grade both levels of an inverted pair; the temperature and salinity of a graded level
    both get 4.

    Parameters
    ----------
    batch : ProfileBatch
        Profiles to check.
    variable : str, default="temperature"
        Accepted for the common signature; the check always judges temperature and salinity.
    threshold : float, default=0.03
        Tolerated decrease, kg/m3 ("exceeds" = strictly greater).
    exclude : ndarray of bool, optional
        Levels already graded bad (in temperature or salinity); not used in pairs.

    Returns
    -------
    dict of str to CheckResult
        For ``temperature`` and ``salinity``: statistic = the larger density decrease of
        the level's two pairs (with the level above and below), kg/m3 (negative: stably
        stratified); NaN for levels in no pair.

    Notes
    -----
    This is Argo's reading (flag a decrease beyond 0.03 kg/m3), not the literal QARTOD
    rule, which would also fail nearly homogeneous layers (qc-standards.md §4.3 note).
    """
    t, s, p = batch.temperature, batch.salinity, batch.pressure
    lon = batch.per_level("longitude").astype(np.float64)
    lat = batch.per_level("latitude").astype(np.float64)
    SA = gsw.SA_from_SP(s, p, lon, lat)  # elementwise; NaN in -> NaN out
    CT = gsw.CT_from_t(SA, t, p)
    ok = usable(CT, exclude) & np.isfinite(SA)
    nxt = next_valid_index(batch, ok)
    up = np.flatnonzero(ok & (nxt >= 0))
    lo = nxt[up]
    drop = pair_density_drop(SA[up], CT[up], p[up], SA[lo], CT[lo], p[lo])
    stat = np.full(t.size, np.nan)
    stat[up] = drop  # as the shallower level of its pair below
    stat[lo] = np.fmax(stat[lo], drop)  # as the deeper level of its pair above
    grade = np.where(stat > threshold, 4, 1).astype(np.int8)
    grade[np.isnan(stat)] = 0
    out = {}
    for name, v in (("temperature", t), ("salinity", s)):
        g = grade.copy()
        g[np.isnan(v)] = 0
        out[name] = CheckResult(stat.copy(), g)
    return out
