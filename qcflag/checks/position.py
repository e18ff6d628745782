"""Position and time sanity checks (Argo real-time tests 2, 3 and 4, and a sea-floor check).

Each check judges a whole profile (its date or position) or a level against the sea floor,
and gives its verdict to temperature, salinity and pressure at every level of the profile
(grade 0 at levels where that variable is missing). All are vectorised over the batch.

Sources: Argo quality control manual, real-time tests 2 (impossible date), 3 (impossible
location) and 4 (position on land), as summarised in ../shared/reference/qc-standards.md
§1.3; QARTOD's location test uses the same latitude/longitude limits (§4.3). The sea-floor
check is qcflag's own (a level deeper than the charted sea floor); its tolerance is a
judgement because the packaged bathymetry is a 10-arcminute grid.

Automated flags assist expert quality control; they do not replace it.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Literal

import numpy as np
import pandas as pd

from qcflag.checks.base import CheckResult

if TYPE_CHECKING:
    from numpy.typing import NDArray

    from qcflag.profiles import ProfileBatch

__all__ = ["EARLIEST_DATE", "below_seafloor", "date", "on_land", "position"]

JUDGED: tuple[str, ...] = ("temperature", "salinity", "pressure")
"""Variables that take a profile-level verdict."""

EARLIEST_DATE = "1997-01-01"
"""Argo test 2: a profile date before 1 January 1997 is impossible (qc-standards.md §1.3)."""


def _spread(
    batch: ProfileBatch,
    stat: NDArray[np.float64],
    grade: NDArray[np.int8],
    *,
    per_profile: bool,
    judged: tuple[str, ...] = JUDGED,
) -> dict[str, CheckResult]:
    """Give a verdict to every judged variable, broadcasting per-profile arrays to levels."""
    if per_profile:
        stat = stat[batch.profile_index]
        grade = grade[batch.profile_index]
    out = {}
    for name in judged:
        g = grade.copy()
        g[np.isnan(batch.values(name))] = 0
        out[name] = CheckResult(stat.copy(), g)
    return out


def _positions(batch: ProfileBatch) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    lat = batch.profiles["latitude"].to_numpy(dtype=np.float64)
    lon = batch.profiles["longitude"].to_numpy(dtype=np.float64)
    return lat, lon


def _valid_position(lat: NDArray[np.float64], lon: NDArray[np.float64]) -> NDArray[np.bool_]:
    return np.isfinite(lat) & np.isfinite(lon) & (np.abs(lat) <= 90.0) & (np.abs(lon) <= 180.0)


def position(batch: ProfileBatch) -> dict[str, CheckResult]:
    """Grade impossible positions (Argo test 3, impossible location).

    A profile is bad (4) when its latitude or longitude is missing, ``|lat| > 90`` or
    ``|lon| > 180`` (limits inclusive: 90 and 180 pass). Longitudes in 0..360 convention
    above 180 therefore fail, as the Argo test says; convert them when reading.

    Parameters
    ----------
    batch : ProfileBatch
        Profiles to check.

    Returns
    -------
    dict of str to CheckResult
        Keyed by ``"temperature"``, ``"salinity"``, ``"pressure"``. Statistic: excess beyond
        the limits in degrees, ``max(|lat| - 90, |lon| - 180)`` (zero or negative for a
        possible position); NaN where the position is missing.
    """
    lat, lon = _positions(batch)
    with np.errstate(invalid="ignore"):
        stat = np.maximum(np.abs(lat) - 90.0, np.abs(lon) - 180.0)
    grade = np.where(_valid_position(lat, lon), 1, 4).astype(np.int8)
    return _spread(batch, stat, grade, per_profile=True)


def date(
    batch: ProfileBatch,
    *,
    earliest: str | np.datetime64 = EARLIEST_DATE,
    now: str | np.datetime64 | None = None,
) -> dict[str, CheckResult]:
    """Grade impossible profile dates (Argo test 2, impossible date).

    A profile is bad (4) when its time is missing (NaT), earlier than `earliest` or later
    than `now`. Month/day/hour validity is guaranteed by the datetime type itself.

    Parameters
    ----------
    batch : ProfileBatch
        Profiles to check.
    earliest : str or numpy.datetime64, default="1997-01-01"
        First possible date (inclusive). The Argo value suits float data; lower it for
        historical ship CTD archives.
    now : str or numpy.datetime64, optional
        Latest possible time (inclusive); default the current UTC time.

    Returns
    -------
    dict of str to CheckResult
        Keyed by ``"temperature"``, ``"salinity"``, ``"pressure"``. Statistic: days outside
        the allowed window, ``time - now`` after `now`, else ``earliest - time`` (zero or
        negative inside, and independent of the current time there); NaN where the time is
        missing.
    """
    t = batch.profiles["time"].to_numpy().astype("datetime64[ns]")
    lo = np.datetime64(pd.Timestamp(earliest).tz_localize(None), "ns")
    hi_ts = pd.Timestamp.now(tz="UTC") if now is None else pd.Timestamp(now)
    hi = np.datetime64(hi_ts.tz_localize(None) if hi_ts.tzinfo else hi_ts, "ns")
    missing = np.isnat(t)
    day = np.timedelta64(86_400_000_000_000, "ns")
    before = (lo - t) / day
    after = np.ceil((t - hi) / day)  # whole days, so it ticks at most once a day
    # after `now`: days past it; otherwise days before `earliest` (negative inside the window),
    # so the statistic (a learning feature) does not change with the clock
    stat = np.where(missing, np.nan, np.where(t > hi, after, before))
    bad = missing | (t < lo) | (t > hi)
    grade = np.where(bad, 4, 1).astype(np.int8)
    return _spread(batch, stat.astype(np.float64), grade, per_profile=True)


def on_land(
    batch: ProfileBatch,
    *,
    method: Literal["bilinear", "deepest", "nearest"] = "deepest",
    min_depth: float = 0.0,
) -> dict[str, CheckResult]:
    """Grade profiles whose position is on land by the packaged bathymetry (Argo test 4).

    Parameters
    ----------
    batch : ProfileBatch
        Profiles to check.
    method : {"deepest", "bilinear", "nearest"}, default="deepest"
        How the sea floor is read from the 10-arcminute grid (see
        :func:`qcflag.reference.seafloor_depth`). ``"deepest"`` calls a position land only
        when all four surrounding grid nodes are land, so coastal stations are not flagged
        for the grid's coarseness.
    min_depth : float, default=0.0
        A position is on land when its sea-floor depth is less than this, m.

    Returns
    -------
    dict of str to CheckResult
        Keyed by ``"temperature"``, ``"salinity"``, ``"pressure"``. Statistic: sea-floor
        depth, m, positive down (negative on land). Grade 4 on land; 0 (and NaN statistic)
        where the position is impossible (that is :func:`position`'s job).
    """
    from qcflag.reference.fields import seafloor_depth

    lat, lon = _positions(batch)
    ok = _valid_position(lat, lon)
    depth = np.full(lat.size, np.nan)
    depth[ok] = seafloor_depth(lat[ok], lon[ok], method=method)
    grade = np.where(depth < min_depth, 4, 1).astype(np.int8)
    grade[~ok] = 0
    return _spread(batch, depth, grade, per_profile=True)


def below_seafloor(
    batch: ProfileBatch,
    *,
    tolerance: float = 500.0,
    method: Literal["bilinear", "deepest", "nearest"] = "deepest",
) -> dict[str, CheckResult]:
    """Grade levels deeper than the sea floor of the packaged bathymetry.

    Parameters
    ----------
    batch : ProfileBatch
        Profiles to check.
    tolerance : float, default=500.0
        Allowed excess depth, m. The packaged grid holds 10-arcminute block means of ETOPO5,
        which on continental slopes, in canyons and in poorly surveyed areas can be hundreds
        of metres shallower than the true bottom (judgement).
    method : {"deepest", "bilinear", "nearest"}, default="deepest"
        How the sea floor is read from the grid (see
        :func:`qcflag.reference.seafloor_depth`).

    Returns
    -------
    dict of str to CheckResult
        Keyed by ``"temperature"``, ``"salinity"``, ``"pressure"``. Statistic: level depth
        minus sea-floor depth, m (``gsw.z_from_p`` depth; negative above the floor). Grade 3
        where it exceeds `tolerance`; 0 where the position or the pressure is missing.
    """
    from qcflag.reference.fields import level_depth, seafloor_depth

    lat, lon = _positions(batch)
    ok = _valid_position(lat, lon)
    floor = np.full(lat.size, np.nan)
    floor[ok] = seafloor_depth(lat[ok], lon[ok], method=method)
    pi = batch.profile_index
    stat = level_depth(batch) - floor[pi]
    grade = np.where(stat > tolerance, 3, 1).astype(np.int8)
    grade[np.isnan(stat)] = 0
    return _spread(batch, stat, grade, per_profile=False)
