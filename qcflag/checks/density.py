"""Density inversion (Argo real-time test 14) with TEOS-10 through ``gsw``."""

from __future__ import annotations

from typing import TYPE_CHECKING

import gsw
import numpy as np

from qcflag.checks._ragged import broadcast_profiles, grade_levels
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
    n = t.size
    lon = batch.profiles["longitude"].to_numpy(dtype=np.float64)
    lat = batch.profiles["latitude"].to_numpy(dtype=np.float64)
    # Levels that can be in a pair: all inputs present and not already graded bad. gsw is
    # evaluated on these only (it is elementwise, so the values are the same as on all).
    use = np.isfinite(t)
    use &= np.isfinite(s)
    use &= np.isfinite(p)
    if exclude is not None:
        use &= ~exclude
    located = np.isfinite(lon) & np.isfinite(lat)
    if not located.all():
        use &= broadcast_profiles(batch, located)
    per_profile = batch.counts - np.diff(np.searchsorted(np.flatnonzero(~use), batch.offsets))
    p_u = p[use]
    lon_u = np.repeat(lon, per_profile)
    lat_u = np.repeat(lat, per_profile)
    SA = gsw.SA_from_SP(s[use], p_u, lon_u, lat_u)
    t_u = t[use]
    CT = gsw.CT_from_t(SA, t_u, p_u)
    good = np.isfinite(SA) & np.isfinite(CT)
    if not good.all():
        use[use] = good
        SA, CT, p_u = SA[good], CT[good], p_u[good]
        per_profile = batch.counts - np.diff(np.searchsorted(np.flatnonzero(~use),
                                                             batch.offsets))
    m = SA.size
    # pairs of consecutive usable levels (compact order); the few that straddle two
    # profiles are dropped. drop[k + 1] is the pair (k, k + 1), as pair_density_drop
    # computes it (into the position arrays, no longer needed).
    drop = np.full(m + 1, np.nan)
    if m > 1:
        p_mid = np.add(p_u[:-1], p_u[1:], out=lon_u[:m - 1])
        p_mid /= 2
        upper = gsw.rho(SA[:-1], CT[:-1], p_mid, out=lat_u[:m - 1])
        np.subtract(upper, gsw.rho(SA[1:], CT[1:], p_mid, out=t_u[:m - 1]), out=drop[1:m])
        tops = np.cumsum(per_profile)[:-1]  # compact index of each profile's first level
        drop[tops[(tops > 0) & (tops < m)]] = np.nan
    stat = np.full(n, np.nan)
    # as the shallower level of the pair below, then the deeper level of the pair above
    stat[use] = np.fmax(drop[1:], drop[:-1], out=CT)
    # a level with a statistic has both temperature and salinity, so one grade serves both
    grade = grade_levels(stat == stat, stat > threshold)
    return {"temperature": CheckResult(stat, grade),
            "salinity": CheckResult(stat.copy(), grade.copy())}
