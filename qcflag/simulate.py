"""An invented monitoring programme with known truth: the demo and test-scenario generator.

Everything here is **invented**: the Solvaig Margin Programme, its vessels, station lines,
floats, operators and every value are made up. The generator exists so that the demo, the
tests of learning, combining, auditing and reporting, and the benchmarks have a realistic
manually flagged archive whose truth is known. Real archives are institutional and are not
bundled.

What is simulated
-----------------
*Programme.* Two station lines in the north-east Atlantic, worked by two research vessels in
every season: the Corran line off western Iberia (41.3 N, shelf to abyssal plain) and the
Velda line across the Bay of Biscay (45.5 N). CTD casts are bin-averaged at 1 dbar (the
`ctd_spacing`) from near the surface to a few metres above the bottom or to the programme's
standard cast depth. Each cruise deploys profiling floats whose first cycles (10 days apart,
levels 2 dbar near the surface coarsening to 50 dbar at depth, to ~2000 dbar) are quality
controlled with that cruise.

*Background.* An analytic north-east-Atlantic interior (warm, salty Mediterranean outflow
water near 1000 dbar), a seasonal mixed layer whose depth and temperature follow the annual
cycle, a thermocline that sharpens in summer, correlated fine structure (AR(1) in depth:
isopycnal heave and density-compensated thermohaline intrusions) and white instrument noise.
Clean profiles are statically stable (checked with TEOS-10 in the tests).

*Faults* (see :data:`FAULT_KINDS`), each with a true grade per level and per variable; levels
next to a fault are 'probably good' in truth. *Operators*, one per cruise, write the manual
flags (Argo reference table 2 codes) with their own habits; where their flag differs from the
truth, ``truth_<variable>_manual_error`` is set.

*Truth and detectability.* A level's true grade is what a careful data manager with the
truth in hand would write from the profiles themselves. Sensor offsets and drift below what
can be told from the other casts of the cruise (0.02 in salinity, 0.1 degC in temperature;
see :mod:`qcflag._simfaults`) are 'probably good' (2), not 'probably bad': they need
calibration samples, not profile QC. Default rates keep most levels good: a few percent of
levels are truly probably bad or bad.

Truth columns (per level, in ``batch.extra``)
---------------------------------------------
``truth_temperature_grade``, ``truth_salinity_grade``, ``truth_pressure_grade``
    True grade 1-4 (int8); 0 where the value is missing (no ordinal grade).
``truth_fault``
    Fault kind(s) affecting the level, ``;``-separated in :data:`FAULT_KINDS` order; ``""``
    where none.
``truth_temperature_manual_error``, ``truth_salinity_manual_error``,
``truth_pressure_manual_error``
    True where the operator's manual flag of that variable disagrees with its true grade
    through a miss or a mistake (a 'probably good' level written 1 out of the operator's
    habit of using 'probably good' sparingly does not count).
``truth_manual_error``
    The OR of the temperature and salinity manual errors (the judged variables).

Profile-level truth (in ``batch.profiles``): ``truth_time``, ``truth_latitude``,
``truth_longitude`` (the real time and position where a ``bad_date``/``bad_position`` fault
replaced them).
"""

from __future__ import annotations

import json
import math
from collections.abc import Mapping, Sequence
from dataclasses import asdict, dataclass, field, fields
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd

from qcflag._version import __version__
from qcflag.exceptions import QCFlagError
from qcflag.profiles import ProfileBatch

if TYPE_CHECKING:
    from numpy.typing import NDArray

__all__ = [
    "FAULT_KINDS",
    "OPERATORS",
    "PROGRAMME",
    "STATION_LINES",
    "TRUTH_COLUMNS",
    "VESSELS",
    "SimulationConfig",
    "background",
    "default_fault_rates",
    "demo_config",
    "simulate_archive",
    "write_scenario",
]

PROGRAMME = "Solvaig Margin Programme"
"""Name of the invented monitoring programme."""

VESSELS: tuple[tuple[str, str], ...] = (
    ("RV Tern Halloway", "TERNH"),
    ("RV Medra Quay", "MEDRQ"),
)
"""Invented research vessels: (name, platform code)."""

OPERATORS: tuple[str, ...] = (
    "Ilse Marrow",
    "Tobin Achterberg",
    "Sunniva Kell",
    "Dario Feld",
    "Maud Lerato",
    "Oren Pask",
)
"""Invented data-manager names; one operator flags each cruise."""


@dataclass(frozen=True)
class StationLine:
    """An invented hydrographic section and the analytic seafloor it crosses.

    Parameters
    ----------
    name : str
        Line name.
    code : str
        One-letter code used in station names (``C01``).
    latitude : float
        Latitude of the line, degrees north.
    lon_inner, lon_outer : float
        Longitudes of the first (inshore) and last (offshore) station, degrees east.
    coast_lon : float
        Longitude of the coast at `latitude`, degrees east (used by the fallback seafloor).
    shelf_km, shelf_depth, slope_km, abyss_depth : float
        Fallback seafloor: depth rises linearly to `shelf_depth` m at `shelf_km` km from the
        coast, then deepens as ``tanh`` over `slope_km` km to `abyss_depth` m.
    """

    name: str
    code: str
    latitude: float
    lon_inner: float
    lon_outer: float
    coast_lon: float
    shelf_km: float
    shelf_depth: float
    slope_km: float
    abyss_depth: float

    def fallback_depth(self, lon: NDArray[np.float64]) -> NDArray[np.float64]:
        """Analytic seafloor depth (m, positive down) at longitudes `lon` on this line."""
        x = np.maximum((self.coast_lon - lon) * 111.2 * math.cos(math.radians(self.latitude)),
                       0.0)
        shelf = 15.0 + (self.shelf_depth - 15.0) * np.minimum(x / self.shelf_km, 1.0)
        deep = (self.abyss_depth - self.shelf_depth) * np.tanh(
            np.maximum(x - self.shelf_km, 0.0) / self.slope_km
        )
        return shelf + deep


# Two lines at sea in the north-east Atlantic (positions chosen off western Iberia and across
# the Bay of Biscay; the coast longitudes are approximate, from general geography).
STATION_LINES: tuple[StationLine, ...] = (
    StationLine("Corran line", "C", 41.3, -9.05, -14.2, -8.75, 40.0, 160.0, 70.0, 5200.0),
    StationLine("Velda line", "V", 45.5, -1.75, -7.4, -1.30, 140.0, 180.0, 60.0, 4750.0),
)
"""The programme's invented station lines."""

FAULT_KINDS: tuple[str, ...] = (
    "spike",
    "spike_pair",
    "thermal_lag",
    "offset",
    "drift",
    "stuck",
    "pressure_reversal",
    "salinity_hook",
    "surface_noise",
    "density_inversion",
    "digit_rollover",
    "missing_value",
    "bad_position",
    "bad_date",
)
"""Every fault the simulator injects (values of ``truth_fault``)."""

TRUTH_COLUMNS: tuple[str, ...] = (
    "truth_temperature_grade",
    "truth_salinity_grade",
    "truth_pressure_grade",
    "truth_fault",
    "truth_temperature_manual_error",
    "truth_salinity_manual_error",
    "truth_pressure_manual_error",
    "truth_manual_error",
)
"""Per-level truth columns in ``batch.extra``."""


def default_fault_rates() -> dict[str, float]:
    """Default fault rates.

    Returns
    -------
    dict
        Fault kind -> rate. ``spike``, ``spike_pair``: expected number per profile (Poisson).
        ``drift``: probability that a cruise's CTD has a drifting sensor. Every other kind:
        probability per profile (``thermal_lag``, ``pressure_reversal`` and
        ``salinity_hook`` apply to CTD casts only; ``salinity_hook`` to casts that reach
        near the bottom).
    """
    return {
        "spike": 0.30,
        "spike_pair": 0.10,
        "thermal_lag": 0.20,
        "offset": 0.03,
        "drift": 0.15,
        "stuck": 0.03,
        "pressure_reversal": 0.06,
        "salinity_hook": 0.25,
        "surface_noise": 0.15,
        "density_inversion": 0.08,
        "digit_rollover": 0.03,
        "missing_value": 0.06,
        "bad_position": 0.01,
        "bad_date": 0.01,
    }


@dataclass(frozen=True)
class SimulationConfig:
    """Sizes, fault rates and operator habits of a simulated archive (seed-independent).

    Parameters
    ----------
    casts_per_cruise : int, default=20
        CTD stations worked per cruise (spread along the cruise's station line).
    floats_per_cruise : int, default=1
        Profiling floats deployed per cruise.
    cycles_per_float : int, default=6
        Profiles of each float quality controlled with its deployment cruise (10 days apart).
    ctd_spacing : float, default=1.0
        CTD bin size, dbar (1-2 dbar is usual).
    max_cast_pressure : float, default=2000.0
        Standard cast depth, dbar; shallower stations are cast to ~10 m above the bottom.
    float_max_pressure : float, default=2000.0
        Deepest float level, dbar.
    ctd_noise : tuple of float, default=(0.001, 0.002)
        White instrument noise of CTD temperature (degC) and salinity.
    float_noise : tuple of float, default=(0.002, 0.003)
        White instrument noise of float temperature (degC) and salinity.
    fine_structure : float, default=1.0
        Scale of the correlated fine structure (0 turns it off).
    start_year : int, default=2019
        Year of the first cruise; cruises follow about every three months.
    fault_rates : dict, optional
        Fault kind -> rate; see :func:`default_fault_rates` (missing kinds take defaults).
    miss_small, miss_large : tuple of float
        Range of an operator's probability of missing a whole 'probably bad' (truth 3) or
        'bad' (truth 4) fault event.
    severity_bias : tuple of float, default=(-0.35, 0.35)
        Range of an operator's 3-vs-4 habit: positive values are the probability of writing
        4 for a truth-3 event (harsh), negative ones of writing 3 for a truth-4 event (soft).
    probably_good_use : tuple of float, default=(0.2, 0.9)
        Range of the probability that an operator writes 2 where the truth is 2 (else 1).
    mistake_rate : tuple of float, default=(0.01, 0.03)
        Range of the fraction of flagged levels (manual flag 2-4) given a wrong grade.
    false_flag_rate : tuple of float, default=(0.0001, 0.0006)
        Range of the rate per good level at which a run of good temperature or salinity
        levels starts being wrongly flagged 3 or 4 (runs of 1-6 levels).
    """

    casts_per_cruise: int = 20
    floats_per_cruise: int = 1
    cycles_per_float: int = 6
    ctd_spacing: float = 1.0
    max_cast_pressure: float = 2000.0
    float_max_pressure: float = 2000.0
    ctd_noise: tuple[float, float] = (0.001, 0.002)
    float_noise: tuple[float, float] = (0.002, 0.003)
    fine_structure: float = 1.0
    start_year: int = 2019
    fault_rates: Mapping[str, float] = field(default_factory=default_fault_rates)
    miss_small: tuple[float, float] = (0.10, 0.40)
    miss_large: tuple[float, float] = (0.00, 0.05)
    severity_bias: tuple[float, float] = (-0.35, 0.35)
    probably_good_use: tuple[float, float] = (0.2, 0.9)
    mistake_rate: tuple[float, float] = (0.01, 0.03)
    false_flag_rate: tuple[float, float] = (0.0001, 0.0006)

    def __post_init__(self) -> None:
        rates = default_fault_rates()
        unknown = sorted(set(self.fault_rates) - set(rates))
        if unknown:
            raise QCFlagError(
                f"simulation config: unknown fault kind(s) {unknown}; known: "
                f"{', '.join(FAULT_KINDS)}"
            )
        rates.update({k: float(v) for k, v in self.fault_rates.items()})
        for k, v in rates.items():
            if not (v >= 0.0 and math.isfinite(v)):
                raise QCFlagError(f"simulation config: fault rate {k}={v} must be >= 0")
            if k not in ("spike", "spike_pair") and v > 1.0:
                raise QCFlagError(f"simulation config: fault rate {k}={v} is a probability")
        object.__setattr__(self, "fault_rates", rates)
        if self.casts_per_cruise < 0 or self.floats_per_cruise < 0 or self.cycles_per_float < 0:
            raise QCFlagError("simulation config: profile counts must be >= 0")
        if not 0.1 <= self.ctd_spacing <= 10.0:
            raise QCFlagError("simulation config: ctd_spacing must be within 0.1-10 dbar")
        if not 50.0 <= self.max_cast_pressure <= 6000.0:
            raise QCFlagError("simulation config: max_cast_pressure must be within 50-6000")
        if not 200.0 <= self.float_max_pressure <= 6000.0:
            raise QCFlagError("simulation config: float_max_pressure must be within 200-6000")
        for name in ("miss_small", "miss_large", "severity_bias", "probably_good_use",
                     "mistake_rate", "false_flag_rate"):
            lo, hi = getattr(self, name)
            low_limit = -1.0 if name == "severity_bias" else 0.0
            if not low_limit <= lo <= hi <= 1.0:
                raise QCFlagError(f"simulation config: {name}=({lo}, {hi}) is not a range "
                                  f"within [{low_limit}, 1]")

    def to_dict(self) -> dict[str, Any]:
        """Return the configuration as plain JSON-able values."""
        out = asdict(self)
        out["fault_rates"] = dict(self.fault_rates)
        return {k: list(v) if isinstance(v, tuple) else v for k, v in out.items()}

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> SimulationConfig:
        """Rebuild a configuration from :meth:`to_dict` output."""
        names = {f.name for f in fields(cls)}
        unknown = sorted(set(data) - names)
        if unknown:
            raise QCFlagError(f"simulation config: unknown field(s) {unknown}")
        kw = {k: tuple(v) if isinstance(v, list) else v for k, v in data.items()}
        return cls(**kw)


def demo_config() -> SimulationConfig:
    """Return the configuration of the small scenario shipped in ``examples/demo``.

    Six CTD casts per cruise at 2 dbar to at most 600 dbar, one float with three cycles, and
    default fault rates raised so that a four-cruise demo shows every kind of fault.
    """
    rates = {k: min(1.0, 2.0 * v) for k, v in default_fault_rates().items()}
    rates.update(drift=0.5, bad_position=0.08, bad_date=0.08, digit_rollover=0.08,
                 stuck=0.08, pressure_reversal=0.15)
    return SimulationConfig(casts_per_cruise=6, floats_per_cruise=1, cycles_per_float=3,
                            ctd_spacing=2.0, max_cast_pressure=600.0, fault_rates=rates)


# ----------------------------------------------------------------------------- background
def _interior(p: NDArray[np.float64], lat: NDArray[np.float64]
              ) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Analytic winter interior of the north-east Atlantic (T degC, practical salinity)."""
    dlat = lat - 41.0
    t = (2.55 + 9.75 * np.exp(-p / 1050.0) + 1.2 * np.exp(-(((p - 950.0) / 420.0) ** 2))
         - 0.35 * dlat * np.exp(-p / 700.0))
    s = (34.93 + 0.72 * np.exp(-p / 850.0) + 0.26 * np.exp(-(((p - 1000.0) / 380.0) ** 2))
         - 0.025 * dlat * np.exp(-p / 700.0))
    return t, s


_STD_DEPTHS = np.array([0.0, 10, 20, 30, 50, 75, 100, 150, 200, 300, 400, 600, 800, 1000, 1200,
                        1500, 2000, 3000, 4000, 5000, 6500])


def _interior_columns(lat: NDArray[np.float64], lon: NDArray[np.float64]
                      ) -> tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.float64]]:
    """Interior T and S columns at each position on standard depths, statically stable.

    The packaged annual climatology (:mod:`qcflag.reference`) where it has data; below the
    deepest climatological level the analytic interior's shape continues from the last value;
    the analytic interior alone where there is no climatology. Each column is then made
    statically stable (potential density, referenced to the mid-point of each pair of
    standard depths, increases by at least 1e-5 kg/m3 per metre) by raising the deeper
    salinity where needed: the annual mean of a coarse climatology interpolated to one
    position is not guaranteed to be stable, and clean simulated profiles must be.
    """
    import gsw

    depth = _STD_DEPTHS
    p_std = depth * 1.01  # pressure ~ 1.01 x depth (common practice approximation)
    n = lat.size
    t_an, s_an = _interior(np.broadcast_to(p_std, (n, depth.size)), lat[:, None])
    t, s = t_an.copy(), s_an.copy()
    try:
        from qcflag.reference import climatology_columns

        cols = climatology_columns(lat, lon)
        ct_, cs_ = cols.t_mean, cols.s_mean
        cdepth = cols.depth
    except (ImportError, QCFlagError, OSError):
        ct_ = cs_ = None
        cdepth = depth
    if ct_ is not None:
        k = np.searchsorted(depth, cdepth)  # climatology depths are a subset of ours
        ct = np.full((n, depth.size), np.nan)
        cs = np.full((n, depth.size), np.nan)
        ok_k = (k < depth.size)
        ok_k[ok_k] &= depth[k[ok_k]] == cdepth[ok_k]
        ct[:, k[ok_k]], cs[:, k[ok_k]] = ct_[:, ok_k], cs_[:, ok_k]
        valid = np.isfinite(ct) & np.isfinite(cs)
        # last valid standard depth of each column (columns are valid from the top down)
        run = np.cumprod(valid, axis=1).astype(bool)
        last = run.sum(axis=1) - 1
        has = last >= 0
        rows = np.flatnonzero(has)
        lk = last[has]
        dt = ct[rows, lk] - t_an[rows, lk]
        ds = cs[rows, lk] - s_an[rows, lk]
        t[rows] = np.where(run[rows], ct[rows], t_an[rows] + dt[:, None])
        s[rows] = np.where(run[rows], cs[rows], s_an[rows] + ds[:, None])
    lat_b = np.broadcast_to(lat[:, None], t.shape)
    lon_b = np.broadcast_to(lon[:, None], t.shape)
    for k in range(1, depth.size):  # loop over the 21 standard depths, vectorised over columns
        pref = 0.5 * (p_std[k - 1] + p_std[k])
        for _ in range(3):
            sa_a = gsw.SA_from_SP(s[:, k - 1], p_std[k - 1], lon_b[:, k], lat_b[:, k])
            sa_b = gsw.SA_from_SP(s[:, k], p_std[k], lon_b[:, k], lat_b[:, k])
            rho_a = gsw.rho(sa_a, gsw.CT_from_t(sa_a, t[:, k - 1], p_std[k - 1]), pref)
            rho_b = gsw.rho(sa_b, gsw.CT_from_t(sa_b, t[:, k], p_std[k]), pref)
            need = rho_a + 1e-5 * (depth[k] - depth[k - 1]) - rho_b
            s[:, k] += np.where(need > 0.0, need / 0.74 + 1e-4, 0.0)
    return depth, t, s


def _interior_at(depth_std: NDArray[np.float64], t_col: NDArray[np.float64],
                 s_col: NDArray[np.float64], profile_index: NDArray[np.int64],
                 p: NDArray[np.float64]) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Interpolate interior columns linearly in depth to levels."""
    d = np.clip(p / 1.01, depth_std[0], depth_std[-1])
    k = np.clip(np.searchsorted(depth_std, d, side="right") - 1, 0, depth_std.size - 2)
    w = (d - depth_std[k]) / (depth_std[k + 1] - depth_std[k])
    t = t_col[profile_index, k] * (1.0 - w) + t_col[profile_index, k + 1] * w
    s = s_col[profile_index, k] * (1.0 - w) + s_col[profile_index, k + 1] * w
    return t, s


def background(
    pressure: ArrayLikeF,
    latitude: ArrayLikeF,
    longitude: ArrayLikeF,
    day_of_year: ArrayLikeF,
    *,
    profile_index: ArrayLikeF | None = None,
    heave: ArrayLikeF | None = None,
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Noise-free seasonal background temperature and salinity at levels.

    Parameters
    ----------
    pressure : array-like of float, shape (n_levels,)
        Sea pressure, dbar.
    latitude, longitude : array-like of float
        Position, degrees north / east: one per profile with `profile_index`, else scalars
        or one per level.
    day_of_year : array-like of float
        Day of the year, 0-365, per level (or scalar).
    profile_index : array-like of int, shape (n_levels,), optional
        Profile of each level (index into `latitude`/`longitude`).
    heave : array-like of float, optional
        Vertical displacement of the water column, dbar (positive down); the background is
        evaluated at ``pressure - heave``.

    Returns
    -------
    temperature : ndarray of float64
        In-situ temperature, degC (ITS-90).
    salinity : ndarray of float64
        Practical salinity (PSS-78).

    Notes
    -----
    The interior is the packaged annual climatology at the position (see
    :func:`_interior_columns`; an analytic north-east-Atlantic profile where there is none),
    made statically stable. On top sits a homogeneous mixed layer whose depth (about 120
    dbar in late winter, 25 dbar in late summer) follows the annual cycle, warmed by up to
    5 degC and freshened by up to 0.08 in summer, joined to the interior by a thermocline
    whose e-folding scale shrinks from 30 to 8 dbar in summer. Invented but physically
    plausible: statically stable everywhere (tested with TEOS-10).
    """
    p = np.atleast_1d(np.asarray(pressure, dtype=np.float64))
    if heave is not None:
        p = np.maximum(p - np.asarray(heave, dtype=np.float64), 0.0)
    lat = np.atleast_1d(np.asarray(latitude, dtype=np.float64))
    lon = np.atleast_1d(np.asarray(longitude, dtype=np.float64))
    if profile_index is None:
        lat, lon = np.broadcast_to(lat, p.shape), np.broadcast_to(lon, p.shape)
        idx = np.arange(p.size)
    else:
        idx = np.asarray(profile_index, dtype=np.int64)
    doy = np.broadcast_to(np.asarray(day_of_year, dtype=np.float64), p.shape)
    depth_std, t_col, s_col = _interior_columns(np.ascontiguousarray(lat, dtype=np.float64),
                                                np.ascontiguousarray(lon, dtype=np.float64))
    two_pi = 2.0 * math.pi
    winter = 0.5 * (1.0 + np.cos(two_pi * (doy - 50.0) / 365.25))     # 1 in late February
    summer = 0.5 * (1.0 + np.cos(two_pi * (doy - 225.0) / 365.25))    # 1 in mid August
    mld = 25.0 + 95.0 * winter
    warming = 5.0 * summer ** 1.5
    scale = 8.0 + 22.0 * (1.0 - summer)
    t_int, s_int = _interior_at(depth_std, t_col, s_col, idx, np.maximum(p, mld))
    g = np.exp(-np.maximum(p - mld, 0.0) / scale)
    return t_int + warming * g, s_int - 0.08 * summer * g


ArrayLikeF = Any  # documented as array-like of float


# ------------------------------------------------------------------------------- geometry
def _seafloor(lines: NDArray[np.int64], lat: NDArray[np.float64], lon: NDArray[np.float64]
              ) -> NDArray[np.float64]:
    """Seafloor depth, m: the packaged bathymetry when present, else each line's analytic one."""
    depth = np.empty(lat.size)
    for i, line in enumerate(STATION_LINES):  # loop over the two lines
        sel = lines == i
        depth[sel] = line.fallback_depth(lon[sel])
    try:  # the packaged bathymetry, when it has landed
        from qcflag.reference import seafloor_depth  # type: ignore[attr-defined]
    except ImportError:
        return depth
    try:
        real = np.asarray(seafloor_depth(lat, lon), dtype=np.float64)
    except Exception:  # a missing data file falls back to the analytic floor
        return depth
    ok = np.isfinite(real) & (real > 20.0)
    return np.where(ok, real, depth)


def _layout(n_cruises: int, cfg: SimulationConfig, rng: np.random.Generator) -> pd.DataFrame:
    """One row per profile: cruise, station, instrument, time, position, bottom, max pressure."""
    n_c = cfg.casts_per_cruise
    n_f = cfg.floats_per_cruise * cfg.cycles_per_float
    per = n_c + n_f
    cruise = np.repeat(np.arange(n_cruises), per)
    k = np.tile(np.arange(per), n_cruises)
    is_ctd = k < n_c
    line = (np.arange(n_cruises) % len(STATION_LINES))[cruise]
    vessel = ((np.arange(n_cruises) // len(STATION_LINES)) % len(VESSELS))[cruise]
    # cruise start: every ~91 days from mid-January of the start year, +-12 days
    base = np.datetime64(f"{cfg.start_year}-01-15T06:00:00", "s")
    start_days = np.arange(n_cruises) * 91.3 + rng.uniform(-12.0, 12.0, n_cruises)
    lat0 = np.array([ln.latitude for ln in STATION_LINES])[line]
    lon_in = np.array([ln.lon_inner for ln in STATION_LINES])[line]
    lon_out = np.array([ln.lon_outer for ln in STATION_LINES])[line]
    # CTD stations spread evenly from inshore to offshore
    frac = np.where(is_ctd, k / max(n_c - 1, 1), 1.0)
    cast_fraction = np.where(is_ctd, frac, 0.0)
    station_no = np.where(is_ctd, k + 1, 0)
    lat = lat0 + np.where(is_ctd, rng.normal(0.0, 0.004, cruise.size), 0.0)
    lon = lon_in + frac * (lon_out - lon_in) + np.where(
        is_ctd, rng.normal(0.0, 0.004, cruise.size), 0.0)
    hours = np.where(is_ctd, k * 7.0 + rng.uniform(-1.0, 1.0, cruise.size), 0.0)
    # floats: deployed at the outermost station, drifting slowly west with a random walk
    kf = np.where(is_ctd, 0, k - n_c)
    float_no = kf // max(cfg.cycles_per_float, 1)
    cycle = kf % max(cfg.cycles_per_float, 1) + 1
    days_after = 10.0 * cycle - 9.0
    drift_lon = rng.normal(-0.025, 0.03, cruise.size) * days_after
    drift_lat = rng.normal(0.0, 0.025, cruise.size) * days_after
    lon = np.where(is_ctd, lon, lon_out - 0.15 * float_no + drift_lon)
    lat = np.where(is_ctd, lat, lat0 + 0.2 * float_no + drift_lat)
    hours = np.where(is_ctd, hours, n_c * 7.0 + 24.0 * days_after)
    time = base + ((start_days[cruise] * 86400.0 + hours * 3600.0).round()).astype(
        "timedelta64[s]")
    yy = ((base + (start_days * 86400.0).round().astype("timedelta64[s]"))
          .astype("datetime64[Y]").astype(np.int64) + 1970) % 100
    seq = np.arange(n_cruises) + 1
    cruise_id = np.array([f"SMP{y:02d}-{s:03d}" for y, s in zip(yy, seq, strict=True)])
    codes = np.array([ln.code for ln in STATION_LINES])[line]
    station = np.where(
        is_ctd,
        np.char.add(codes, np.char.zfill(station_no.astype(str), 2)),
        "",
    )
    vessel_code = np.array([v[1] for v in VESSELS])[vessel]
    float_code = np.char.add("SMF-", (101 + cruise * max(cfg.floats_per_cruise, 1)
                                      + float_no).astype(str))
    platform = np.where(is_ctd, vessel_code, float_code)
    profile_id = np.where(
        is_ctd,
        np.char.add(np.char.add(cruise_id[cruise], "_"), station),
        np.char.add(np.char.add(float_code, "_"), np.char.zfill(cycle.astype(str), 3)),
    )
    bottom = _seafloor(line, lat, lon)
    # pressure ~ 1.01 x depth in the upper few km (common practice approximation)
    ctd_max = np.minimum(cfg.max_cast_pressure, 1.01 * (bottom - rng.uniform(6.0, 15.0,
                                                                               bottom.size)))
    near_bottom = is_ctd & (ctd_max < cfg.max_cast_pressure)
    fmax = np.minimum(cfg.float_max_pressure, 1.01 * bottom - 30.0)
    prof = pd.DataFrame({
        "profile_id": profile_id.astype(object),
        "cruise": cruise_id[cruise].astype(object),
        "time": pd.to_datetime(time.astype("datetime64[ns]")),
        "latitude": np.round(lat, 4),
        "longitude": np.round(lon, 4),
        "platform": platform.astype(object),
        "operator": "",
        "instrument": np.where(is_ctd, "ctd", "float").astype(object),
        "station": station.astype(object),
    })
    prof.attrs["_internal"] = {
        "cruise_index": cruise,
        "cast_fraction": cast_fraction,
        "line": line,
        "is_ctd": is_ctd,
        "max_pressure": np.where(is_ctd, ctd_max, fmax),
        "near_bottom": near_bottom,
        "bottom": bottom,
    }
    return prof


_FLOAT_STEPS = ((10.0, 2.0), (200.0, 2.0), (500.0, 10.0), (1000.0, 25.0), (6000.0, 50.0))


def _float_template(max_pressure: float) -> NDArray[np.float64]:
    """Nominal float sampling levels: 2 dbar to 200, 10 to 500, 25 to 1000, 50 below."""
    levels = [4.0]
    p = 4.0
    for top, step in _FLOAT_STEPS:
        while p + step <= min(top, max_pressure):
            p += step
            levels.append(p)
    return np.asarray(levels)


def _pressures(meta: dict[str, Any], cfg: SimulationConfig, rng: np.random.Generator
               ) -> tuple[NDArray[np.int64], NDArray[np.float64]]:
    """Offsets and flat pressure levels (bin centres for CTDs, jittered template for floats)."""
    is_ctd = meta["is_ctd"]
    pmax = meta["max_pressure"]
    dp = cfg.ctd_spacing
    top = np.where(is_ctd, rng.integers(1, 4, is_ctd.size) * dp, 0.0)
    template = _float_template(cfg.float_max_pressure)
    n_ctd = np.floor((pmax - top) / dp).astype(np.int64) + 1
    n_float = np.searchsorted(template, pmax, side="right").astype(np.int64)
    counts = np.maximum(np.where(is_ctd, n_ctd, n_float), 3)
    offsets = np.concatenate([[0], np.cumsum(counts)]).astype(np.int64)
    pi = np.repeat(np.arange(counts.size), counts)
    li = np.arange(offsets[-1]) - offsets[:-1][pi]
    ctd_p = top[pi] + dp * li
    tmpl = template[np.minimum(li, template.size - 1)]
    float_p = np.round(tmpl + rng.uniform(-0.4, 0.4, li.size), 1)
    p = np.where(is_ctd[pi], ctd_p, float_p)
    return offsets, p


def _ar1(rng: np.random.Generator, offsets: NDArray[np.int64], p: NDArray[np.float64],
         step: float, length: float) -> NDArray[np.float64]:
    """Unit-variance AR(1) noise in pressure (correlation e-folding `length` dbar).

    Built on a virtual grid of spacing `step` per profile (one long flat sequence) and
    linearly interpolated to each level's pressure. The recursion ``x[i] = rho x[i-1] +
    sqrt(1 - rho**2) e[i]`` is evaluated as its impulse response truncated where
    ``rho**k < 1e-6`` (a convolution, vectorised).
    """
    counts = np.diff(offsets)
    pi = np.repeat(np.arange(counts.size), counts)
    pmax = np.maximum.reduceat(p, offsets[:-1]) if p.size else np.zeros(0)
    nodes = np.floor(np.maximum(pmax, 0.0) / step).astype(np.int64) + 2
    node_off = np.concatenate([[0], np.cumsum(nodes)])
    rho = math.exp(-step / length)
    n_taps = math.ceil(math.log(1e-6) / math.log(rho)) + 1
    kernel = math.sqrt(1.0 - rho * rho) * rho ** np.arange(n_taps)
    e = rng.standard_normal(int(node_off[-1]) + n_taps)
    x = np.convolve(e, kernel, mode="valid")
    k = np.maximum(p, 0.0) / step
    i0 = np.floor(k).astype(np.int64)
    f = k - i0
    base = node_off[:-1][pi] + i0
    return (1.0 - f) * x[base] + f * x[base + 1]


def _day_of_year(time: pd.Series) -> NDArray[np.float64]:
    t = pd.DatetimeIndex(time)
    return (t.day_of_year.to_numpy() - 1 + t.hour.to_numpy() / 24.0).astype(np.float64)


# ------------------------------------------------------------------------------ the archive
def simulate_archive(
    n_cruises: int = 6,
    *,
    seed: int = 0,
    config: SimulationConfig | None = None,
) -> ProfileBatch:
    """Simulate the invented programme's manually flagged archive with known truth.

    Parameters
    ----------
    n_cruises : int, default=6
        Number of cruises (the station lines alternate; a cruise every ~3 months).
    seed : int, default=0
        Seed of the random generator; the same seed gives the same archive.
    config : SimulationConfig, optional
        Sizes, fault rates and operator habits (defaults: :class:`SimulationConfig()`).

    Returns
    -------
    ProfileBatch
        Manual flags in ``flags`` (``"temperature"``, ``"salinity"``, ``"pressure"``) as Argo
        reference table 2 codes (scheme ``"argo"``); ``profiles`` with ``profile_id, cruise,
        time, latitude, longitude, platform, operator, instrument, station`` and the profile
        truth (``truth_time``, ``truth_latitude``, ``truth_longitude``); per-level truth in
        ``extra`` (:data:`TRUTH_COLUMNS`). ``attrs["simulation"]`` holds the seed, the
        configuration, each operator's habits and every fault event (``events``: lists
        ``kind`` and ``profile``; profile -1 for a cruise-wide drift).

    Raises
    ------
    QCFlagError
        If `n_cruises` or `seed` is invalid.

    Examples
    --------
    >>> b = simulate_archive(2, seed=1, config=SimulationConfig(casts_per_cruise=3,
    ...                      floats_per_cruise=0, max_cast_pressure=300))
    >>> b.n_profiles, sorted(b.flags)
    (6, ['pressure', 'salinity', 'temperature'])
    """
    from qcflag import _simfaults

    if isinstance(n_cruises, bool) or not isinstance(n_cruises, (int, np.integer)) \
            or n_cruises < 1:
        raise QCFlagError(f"simulate: n_cruises must be a positive integer, got {n_cruises!r}")
    if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or seed < 0:
        raise QCFlagError(f"simulate: seed must be a non-negative integer, got {seed!r}")
    cfg = config if config is not None else SimulationConfig()
    rng = np.random.default_rng(np.random.SeedSequence([int(seed), 20190115]))

    prof = _layout(int(n_cruises), cfg, rng)
    meta = prof.attrs.pop("_internal")
    offsets, p = _pressures(meta, cfg, rng)
    faults = _simfaults.FaultBook(offsets, meta, rng)
    p = _simfaults.pressure_faults(faults, p, cfg)
    pi = faults.profile_index
    is_ctd = meta["is_ctd"][pi]

    # background + correlated fine structure + instrument noise
    doy = _day_of_year(prof["time"])[pi]
    fs = cfg.fine_structure
    heave = fs * 1.5 * _ar1(rng, offsets, p, 10.0, 40.0)
    t, s = background(p, prof["latitude"].to_numpy(), prof["longitude"].to_numpy(), doy,
                      profile_index=pi, heave=heave)
    intr = fs * _ar1(rng, offsets, p, 1.0, 6.0)
    amp = 0.004 + 0.025 * np.exp(-(((p - 1000.0) / 400.0) ** 2))  # interleaving near the MOW
    t = t + amp * intr
    s = s + 0.22 * amp * intr  # ~ alpha/beta: density-compensated intrusions
    n_t = np.where(is_ctd, cfg.ctd_noise[0], cfg.float_noise[0])
    n_s = np.where(is_ctd, cfg.ctd_noise[1], cfg.float_noise[1])
    t = t + n_t * rng.standard_normal(t.size)
    s = s + n_s * rng.standard_normal(s.size)

    t, s, prof = _simfaults.value_faults(faults, p, t, s, prof, cfg)
    p = np.round(p, 2)
    t = np.round(t, 4)
    s = np.round(s, 4)

    truth = faults.truth_arrays()
    ops = _simfaults.draw_operators(rng, cfg)
    cruise_op = rng.permutation(int(n_cruises)) % len(OPERATORS)
    prof["operator"] = np.asarray(OPERATORS, dtype=object)[cruise_op[meta["cruise_index"]]]
    flags, manual_error = _simfaults.operator_flags(
        faults, truth, ops, cruise_op[meta["cruise_index"]][pi], rng, cfg
    )
    extra = pd.DataFrame({
        "truth_temperature_grade": truth["temperature"],
        "truth_salinity_grade": truth["salinity"],
        "truth_pressure_grade": truth["pressure"],
        "truth_fault": faults.fault_strings(),
        **{f"truth_{v}_manual_error": manual_error[v]
           for v in ("temperature", "salinity", "pressure")},
        "truth_manual_error": manual_error["temperature"] | manual_error["salinity"],
    })
    return ProfileBatch(
        offsets=offsets,
        pressure=p,
        temperature=t,
        salinity=s,
        profiles=prof,
        flags=flags,
        scheme="argo",
        extra=extra,
        attrs={
            "sources": [],
            "simulation": {
                "programme": PROGRAMME,
                "seed": int(seed),
                "n_cruises": int(n_cruises),
                "config": cfg.to_dict(),
                "operators": {name: ops[i] for i, name in enumerate(OPERATORS)},
                "invented": True,
                "events": faults.events(),
            },
        },
    )


# ------------------------------------------------------------------------------- writing
def write_scenario(
    out_dir: str | Path,
    *,
    n_cruises: int = 6,
    seed: int = 0,
    config: SimulationConfig | None = None,
    formats: Sequence[str] = ("csv", "nc"),
    overwrite: bool = False,
) -> list[Path]:
    """Simulate an archive and write one file per cruise and format, plus ``scenario.json``.

    Parameters
    ----------
    out_dir : path-like
        Output folder (created if needed). Files are written atomically through
        :func:`qcflag.io.write` (canonical CSV with the truth columns after the standard
        ones; CF DSG NetCDF).
    n_cruises, seed, config
        As :func:`simulate_archive`.
    formats : sequence of {"csv", "nc"}, default=("csv", "nc")
        File formats to write: canonical CSV (``<cruise>.csv``) and/or CF DSG NetCDF
        (``<cruise>.nc``).
    overwrite : bool, default=False
        Replace existing files.

    Returns
    -------
    list of Path
        The files written, in order (``scenario.json`` last).

    Raises
    ------
    QCFlagError
        On an unknown format, or (``OutputExistsError``) if a file exists and `overwrite`
        is false; nothing is written in that case.
    """
    from qcflag.io.atomic import atomic_output, check_writable

    fmts = tuple(dict.fromkeys(str(f).lower() for f in formats))
    bad = [f for f in fmts if f not in ("csv", "nc")]
    if bad or not fmts:
        raise QCFlagError(f"simulate: unknown format(s) {bad or list(formats)}; use csv, nc")
    cfg = config if config is not None else SimulationConfig()
    batch = simulate_archive(n_cruises, seed=seed, config=cfg)
    out = Path(out_dir)
    if out.exists() and not out.is_dir():
        raise QCFlagError(f"{out}: exists and is not a folder; choose another --out")
    cruises = list(dict.fromkeys(batch.profiles["cruise"]))
    targets = [out / f"{c}.{f}" for c in cruises for f in fmts] + [out / "scenario.json"]
    for path in targets:  # refuse before writing anything
        check_writable(path, overwrite=overwrite)
    out.mkdir(parents=True, exist_ok=True)
    cruise_col = batch.profiles["cruise"].to_numpy()
    from qcflag.io.files import write

    written: list[Path] = []
    for c in cruises:  # loop over cruises
        sub = batch.select(cruise_col == c)
        for f in fmts:
            path = out / f"{c}.{f}"
            write(sub, path, overwrite=overwrite)
            written.append(path)
    info = {
        "programme": PROGRAMME,
        "invented": True,
        "note": "Simulated scenario with known truth; not real observations.",
        "qcflag_version": __version__,
        "seed": int(seed),
        "n_cruises": int(n_cruises),
        "config": cfg.to_dict(),
        "operators": batch.attrs["simulation"]["operators"],
        "cruises": {
            c: {
                "operator": str(batch.profiles.loc[cruise_col == c, "operator"].iloc[0]),
                "n_profiles": int((cruise_col == c).sum()),
                "n_levels": int(batch.counts[cruise_col == c].sum()),
            }
            for c in cruises
        },
        "files": [p.name for p in written],
    }
    path = out / "scenario.json"
    with atomic_output(path, overwrite=overwrite) as tmp:
        tmp.write_text(json.dumps(info, indent=2, sort_keys=True) + "\n", encoding="utf-8")
    written.append(path)
    return written
