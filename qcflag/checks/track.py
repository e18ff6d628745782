"""Impossible speed between consecutive fixes of one platform (Argo real-time test 5).

A platform cannot move faster than a ship steams or a float drifts. Sorting each
platform's profiles by time, the speed needed between consecutive fixes is distance over
elapsed time; a fix that needs an impossible speed *both* from the fix before it and to the
fix after it, while those two are consistent with each other, is the offender (Argo: "flag
the offending position and/or time, if it can be isolated"). At the ends of a track the
first (last) fix is the offender when it is too fast to reach its neighbour and that
neighbour is consistent with the fix beyond it.

Sources: Argo quality control manual, real-time test 5 (surface drift speed between fixes
must not exceed 3 m/s), as summarised in ../shared/reference/qc-standards.md §1.3 (tag M,
from memory). The limit for ship-borne casts is qcflag's own choice (common practice: no
research vessel steams near 10 m/s, about 19 knots, between stations).

Automated flags assist expert quality control; they do not replace it.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np
import pandas as pd

from qcflag.checks.base import CheckResult
from qcflag.checks.position import _positions, _spread, _valid_position

if TYPE_CHECKING:
    from numpy.typing import NDArray

    from qcflag.profiles import ProfileBatch

__all__ = ["EARTH_RADIUS_M", "great_circle_distance", "impossible_speed", "track_codes"]

EARTH_RADIUS_M = 6_371_000.0
"""Mean Earth radius, m (the sphere ``gsw.distance`` also uses; common practice)."""

JUDGED: tuple[str, ...] = ("temperature", "salinity")
"""Variables that take the verdict: values whose position is unknown cannot be used."""


def great_circle_distance(lat1: NDArray[np.float64], lon1: NDArray[np.float64],
                          lat2: NDArray[np.float64], lon2: NDArray[np.float64]
                          ) -> NDArray[np.float64]:
    """Haversine distance on a sphere of radius :data:`EARTH_RADIUS_M`, m, element-wise.

    Parameters
    ----------
    lat1, lon1, lat2, lon2 : ndarray of float64
        Positions in degrees north and east.

    Returns
    -------
    ndarray of float64
        NaN where a position is NaN.
    """
    p1, p2 = np.radians(lat1), np.radians(lat2)
    dphi = p2 - p1
    dlam = np.radians(lon2 - lon1)
    h = np.sin(dphi / 2) ** 2 + np.cos(p1) * np.cos(p2) * np.sin(dlam / 2) ** 2
    return 2.0 * EARTH_RADIUS_M * np.arcsin(np.sqrt(np.clip(h, 0.0, 1.0)))


def track_codes(profiles: pd.DataFrame) -> NDArray[np.int64]:
    """Integer track of every profile: one per (``cruise``, ``platform``) pair.

    The platform must be known: a file without platform identifiers may mix ships and
    floats (two floats surfacing at the same instant are not one platform moving
    infinitely fast), so its profiles are on no track (-1). A platform's fixes are compared
    within one cruise only, so flagging each cruise on its own (as chunked and parallel runs
    do) gives the same verdicts as flagging them together.

    Parameters
    ----------
    profiles : pandas.DataFrame
        The batch's profile table.

    Returns
    -------
    ndarray of int64, shape (n_profiles,)
    """
    n = len(profiles)
    if "platform" not in profiles.columns:
        return np.full(n, -1, dtype=np.int64)
    platform, unknown = _text(profiles["platform"])
    key = platform
    if "cruise" in profiles.columns:
        key = np.char.add(np.char.add(_text(profiles["cruise"])[0], "\x1f"), platform)
    _, codes = np.unique(key, return_inverse=True)
    return np.where(unknown, -1, codes).astype(np.int64)


def _text(column: pd.Series) -> tuple[NDArray[np.str_], NDArray[np.bool_]]:
    """Return the stripped text of a metadata column and where it is missing or empty."""
    raw = column.to_numpy(dtype=object)
    missing = pd.isna(raw)
    txt = np.char.strip(np.where(missing, "", raw).astype(str))
    return txt, missing | (txt == "")


def _speed(d: NDArray[np.float64], dt: NDArray[np.float64]) -> NDArray[np.float64]:
    """Distance over time; two different fixes at the same instant need infinite speed."""
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(dt > 0, d / np.where(dt > 0, dt, 1.0), np.where(d > 0, np.inf, 0.0))


def impossible_speed(
    batch: ProfileBatch,
    *,
    variable: str = "temperature",
    float_max_speed: float = 3.0,
    ship_max_speed: float = 10.0,
    level_grade: int = 3,
) -> dict[str, CheckResult]:
    """Grade the profiles of a fix that needs an impossible speed (Argo test 5).

    Tracks are the profiles of one known ``platform`` within one ``cruise`` with a usable
    position (finite, within -90..90 and -180..180) and time, sorted by time. Profiles whose
    ``instrument`` is ``"float"`` use `float_max_speed`, all others `ship_max_speed`.

    Parameters
    ----------
    batch : ProfileBatch
        Profiles to check.
    variable : str, default="temperature"
        Accepted for the common signature; the check always judges temperature and salinity.
    float_max_speed : float, default=3.0
        Argo test 5 limit for a float's surface drift, m/s (qc-standards.md §1.3, from
        memory).
    ship_max_speed : float, default=10.0
        Limit for ship-borne casts, m/s (qcflag's choice; common practice, not a published
        value).
    level_grade : {3, 4}, default=3
        Grade given to the temperature and salinity of an offending profile. The values
        themselves may be fine, but where they were measured is unknown: 'probably bad' is
        qcflag's default; Argo flags the position itself 4.

    Returns
    -------
    dict of str to CheckResult
        Keyed by ``"temperature"`` and ``"salinity"``. Statistic: the smaller of the speeds
        from the previous fix and to the next fix, m/s (NaN for a profile alone on its
        track or without a usable position and time). Grade `level_grade` at the levels of
        an offending profile, 1 where the profile was assessed, 0 where it could not be (or
        the value is missing). A track of two fixes that are too far apart cannot say which
        one is wrong: both pass, and the statistic shows the speed.
    """
    if level_grade not in (3, 4):
        raise ValueError(f"level_grade must be 3 or 4, got {level_grade}")
    prof = batch.profiles
    n = len(prof)
    lat, lon = _positions(batch)
    if "time" in prof.columns:
        t = pd.to_datetime(prof["time"]).to_numpy().astype("datetime64[ns]")
    else:
        t = np.full(n, np.datetime64("NaT"), dtype="datetime64[ns]")
    seconds = t.astype(np.int64) / 1e9
    track = track_codes(prof)
    ok = _valid_position(lat, lon) & ~np.isnat(t) & (track >= 0)
    if "instrument" in prof.columns:
        is_float = np.char.lower(_text(prof["instrument"])[0]) == "float"
        limit_all = np.where(is_float, float_max_speed, ship_max_speed)
    else:
        limit_all = np.full(n, float(ship_max_speed))

    stat = np.full(n, np.nan)
    offender = np.zeros(n, dtype=bool)
    idx = np.flatnonzero(ok)
    if idx.size >= 2:
        idx = idx[np.lexsort((seconds[idx], track[idx]))]
        sec = seconds[idx]
        la, lo, tr, lim = lat[idx], lon[idx], track[idx], limit_all[idx]
        m = idx.size
        same = tr[1:] == tr[:-1]  # pair (k, k+1) on one track
        pair = np.where(same, _speed(great_circle_distance(la[:-1], lo[:-1], la[1:], lo[1:]),
                                     np.diff(sec)), np.nan)
        s_prev = np.full(m, np.nan)
        s_next = np.full(m, np.nan)
        s_prev[1:], s_next[:-1] = pair, pair
        s_skip = np.full(m, np.nan)  # fix k-1 straight to fix k+1
        both = np.zeros(m, dtype=bool)
        both[1:-1] = same[:-1] & same[1:]
        k = np.flatnonzero(both)
        s_skip[k] = _speed(great_circle_distance(la[k - 1], lo[k - 1], la[k + 1], lo[k + 1]),
                           sec[k + 1] - sec[k - 1])
        with np.errstate(invalid="ignore"):
            fast_prev, fast_next = s_prev > lim, s_next > lim
            nxt_ok = np.zeros(m, dtype=bool)  # next fix consistent with the one after it
            nxt_ok[:-1] = s_next[1:] <= lim[1:]
            prv_ok = np.zeros(m, dtype=bool)  # previous fix consistent with the one before
            prv_ok[1:] = s_prev[:-1] <= lim[:-1]
            middle = both & fast_prev & fast_next & (s_skip <= lim)
        has_prev, has_next = ~np.isnan(s_prev), ~np.isnan(s_next)
        first = ~has_prev & has_next & fast_next & nxt_ok
        last = has_prev & ~has_next & fast_prev & prv_ok
        offender[idx] = middle | first | last
        stat[idx] = np.fmin(s_prev, s_next)
    grade = np.where(offender, level_grade, np.where(np.isnan(stat), 0, 1)).astype(np.int8)
    return _spread(batch, stat, grade, per_profile=True, judged=JUDGED)
