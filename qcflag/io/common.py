"""Pieces shared by the readers and writers: added columns, column names, units, times.

Units policy
------------
Every batch holds pressure in dbar, temperature in degrees Celsius (ITS-90) and practical
salinity (PSS-78). Readers convert where a file clearly labels another unit and refuse
(:class:`~qcflag.exceptions.UnitsError`) where the values plainly contradict the label.
The thresholds, all on finite values of the whole file (documented here and in the README):

* temperature labelled Celsius (or unlabelled) with a median above 100 is taken to be in
  kelvin and refused; temperature labelled kelvin with a median below 100 is refused too.
  (Sea water is -2.5 to 40 degC in Argo reference table 3; 100 separates the scales cleanly.)
* pressure labelled dbar (or unlabelled) with a maximum above 15000 is refused as "probably
  pascal" (the deepest ocean is about 11000 dbar; Argo's valid maximum is 12000 dbar).
* pressure labelled in metres (``m``) is refused: that is a depth; give it as depth.
* salinity with conductivity units (``S m-1``, ``mS/cm``), a conductivity standard name, or a
  column/variable name that says conductivity is refused; salinity with a median above 45
  is refused as "probably conductivity in mS/cm" (open-ocean salinity stays below about 42).
  Conductivity in S/m (2.5-6.5) cannot be told from brackish water by value alone, so that
  case is detected from metadata only.
"""

from __future__ import annotations

import re
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

import numpy as np

from qcflag.exceptions import UnitsError

if TYPE_CHECKING:
    from numpy.typing import NDArray

__all__ = [
    "ALIASES",
    "CSV_FILL_VALUES",
    "PROFILE_COLUMNS",
    "AddedColumn",
    "format_times",
    "normalise_units",
    "to_ns",
    "utc_timestamp",
]


@dataclass
class AddedColumn:
    """A per-level column a writer appends to its output (e.g. automatic flags).

    Parameters
    ----------
    values : ndarray of shape (n_levels,)
        The values, one per level of the batch being written.
    attrs : dict
        NetCDF attributes (``standard_name``, ``long_name``, ``flag_values``,
        ``flag_meanings``, ``_FillValue``, ...). When ``flag_values`` is present the values
        are read as stored flag codes (:mod:`qcflag.schemes`) and written as such.
    parent : str or None
        Variable (``"temperature"``, ``"salinity"``, ``"pressure"``) whose
        ``ancillary_variables`` should list this column.
    """

    values: NDArray[Any]
    attrs: dict[str, Any] = field(default_factory=dict)
    parent: str | None = None


# Column-name aliases, matched case-insensitively, in priority order. Names come from the
# trade: Argo (PRES, TEMP, PSAL), WHP-Exchange (CTDPRS, CTDTMP, CTDSAL, EXPOCODE, STNNBR;
# ../shared/reference/formats-and-conventions.md section 4) and plain English.
ALIASES: dict[str, tuple[str, ...]] = {
    "profile_id": ("profile_id", "profile", "cast_id", "station_id", "station", "cast",
                   "stnnbr"),
    "cruise": ("cruise", "cruise_id", "expocode", "cruise_name"),
    "time": ("time", "datetime", "date_time", "time_utc", "date"),
    "latitude": ("latitude", "lat"),
    "longitude": ("longitude", "lon", "long", "lng"),
    "platform": ("platform", "platform_id", "platform_name", "ship", "vessel"),
    "pressure": ("pressure", "pres", "ctdprs", "pressure_dbar", "pres_dbar", "prs"),
    "depth": ("depth", "depth_m"),
    "temperature": ("temperature", "temp", "ctdtmp", "t90", "temperature_degc", "temp_its90"),
    "salinity": ("salinity", "psal", "ctdsal", "sal", "salinity_psu", "salnty"),
}

FLAG_SUFFIXES: tuple[str, ...] = ("_flag", "_qc", "_flag_w")
"""Suffixes of manual-flag columns after any alias of the variable (``TEMP_QC``,
``CTDTMP_FLAG_W``, ``temperature_flag``)."""

PROFILE_COLUMNS: tuple[str, ...] = ("station", "cast", "operator", "instrument", "ship",
                                    "vessel", "section", "stnnbr", "castno", "sect_id",
                                    "project", "pi_name", "data_mode", "direction")
"""Unknown CSV columns that go to ``batch.profiles`` when constant within every profile."""

CSV_FILL_VALUES: tuple[float, ...] = (-999.0, -9999.0, 99999.0)
"""Numbers read as missing in CSV value and position columns: -999 (WHP-Exchange fill,
formats-and-conventions.md section 4), -9999 (common practice) and 99999 (Argo fill)."""

_PRESSURE_UNITS = {
    "dbar": 1.0, "decibar": 1.0, "decibars": 1.0, "dbars": 1.0, "db": 1.0,
    "pa": 1e-4, "pascal": 1e-4, "pascals": 1e-4,
    "hpa": 1e-2, "mbar": 1e-2, "millibar": 1e-2,
    "kpa": 0.1, "bar": 10.0, "bars": 10.0, "mpa": 100.0,
}
_DEPTH_UNITS = {"m", "meter", "meters", "metre", "metres"}
_CELSIUS = {"degc", "degree_celsius", "degrees_celsius", "celsius", "deg_c", "degrees_c",
            "degree_c", "c", "its-90", "its90", "deg c", "degrees c", "degree celsius",
            "°c", "its-90, deg c"}
_KELVIN = {"k", "kelvin", "degk", "degree_kelvin", "degrees_kelvin"}
_SALINITY = {"1", "psu", "pss-78", "pss78", "pss", "0.001", "1e-3", "1.e-3", "ppt", "‰",
             "practical_salinity_unit", "practical salinity units", "unitless", "none"}
_CONDUCTIVITY = re.compile(r"^(m?s\s*/\s*c?m|m?s\s*c?m-1|m?s\.c?m-1|siemens.*)$")

TEMPERATURE_KELVIN_MEDIAN = 100.0
PRESSURE_MAX_DBAR = 15000.0
SALINITY_CONDUCTIVITY_MEDIAN = 45.0


def _norm_unit(units: object) -> str | None:
    if units is None:
        return None
    u = str(units).strip().lower()
    return u or None


def _median(values: NDArray[np.float64]) -> float:
    finite = values[np.isfinite(values)]
    return float(np.median(finite)) if finite.size else float("nan")


def normalise_units(
    values: dict[str, NDArray[np.float64]],
    units: Mapping[str, object],
    *,
    source: str,
    names: Mapping[str, str] | None = None,
    standard_names: Mapping[str, object] | None = None,
    notes: list[str] | None = None,
) -> dict[str, NDArray[np.float64]]:
    """Convert pressure, temperature and salinity to canonical units or refuse them.

    Parameters
    ----------
    values : dict of str to ndarray
        ``"pressure"``, ``"temperature"``, ``"salinity"`` level arrays (float64).
    units : mapping of str to object
        Units attribute of each variable as found in the file (None when absent).
    source : str
        The file, for messages.
    names : mapping of str to str, optional
        Name of the column/variable each value came from, for messages and for spotting
        conductivity given as salinity.
    standard_names : mapping, optional
        ``standard_name`` of each variable, where known.
    notes : list of str, optional
        Receives one line per conversion made.

    Returns
    -------
    dict of str to ndarray
        The arrays in canonical units (new arrays where converted).

    Raises
    ------
    UnitsError
        If a unit is unknown or the values plainly contradict it (thresholds in the module
        docstring).
    """
    names = dict(names or {})
    std = {k: str(v or "") for k, v in (standard_names or {}).items()}
    notes = notes if notes is not None else []
    out = dict(values)

    def var(key: str) -> str:
        return f"variable {names.get(key, key)!r}"

    # pressure ---------------------------------------------------------------------
    p = out["pressure"]
    u = _norm_unit(units.get("pressure"))
    if u is not None:
        if u in _DEPTH_UNITS:
            raise UnitsError(source, f"{var('pressure')} has units {u!r}, a depth, not a "
                             "pressure", "give it as depth (standard_name depth) or in dbar")
        if u not in _PRESSURE_UNITS:
            raise UnitsError(source, f"{var('pressure')} has unknown units {u!r}",
                             "convert pressure to dbar")
        factor = _PRESSURE_UNITS[u]
        if factor != 1.0:
            p = p * factor
            notes.append(f"pressure converted from {u} to dbar")
    finite = p[np.isfinite(p)]
    if finite.size and float(finite.max()) > PRESSURE_MAX_DBAR:
        raise UnitsError(
            source,
            f"{var('pressure')} reaches {float(finite.max()):.6g} dbar, deeper than any ocean "
            f"(> {PRESSURE_MAX_DBAR:g}); the values look like pascal",
            "convert pressure to dbar or label its units",
        )
    out["pressure"] = p

    # temperature ------------------------------------------------------------------
    t = out["temperature"]
    u = _norm_unit(units.get("temperature"))
    med = _median(t)
    if u is not None and u not in _CELSIUS and u not in _KELVIN:
        raise UnitsError(source, f"{var('temperature')} has unknown units {u!r}",
                         "convert temperature to degree_Celsius (ITS-90)")
    if u in _KELVIN:
        if np.isfinite(med) and med < TEMPERATURE_KELVIN_MEDIAN:
            raise UnitsError(
                source,
                f"{var('temperature')} is labelled {u!r} but its median is {med:.4g}, "
                "which looks like degrees Celsius",
                "fix the units attribute",
            )
        t = t - 273.15
        notes.append("temperature converted from kelvin to degree_Celsius")
    elif np.isfinite(med) and med > TEMPERATURE_KELVIN_MEDIAN:
        raise UnitsError(
            source,
            f"{var('temperature')} has median {med:.5g} (> {TEMPERATURE_KELVIN_MEDIAN:g}); "
            "the values look like kelvin",
            "convert to degree_Celsius or label the units as K",
        )
    out["temperature"] = t

    # salinity ---------------------------------------------------------------------
    s = out["salinity"]
    u = _norm_unit(units.get("salinity"))
    name = names.get("salinity", "").lower()
    if (
        (u is not None and _CONDUCTIVITY.match(u))
        or "conductivity" in std.get("salinity", "")
        or "cndc" in name
        or "cond" in name
    ):
        raise UnitsError(
            source,
            f"{var('salinity')} is a conductivity (units {u!r}), not a practical salinity",
            "compute practical salinity first (e.g. gsw.SP_from_C) and give that",
        )
    if u is not None and u not in _SALINITY:
        raise UnitsError(source, f"{var('salinity')} has unknown units {u!r}",
                         "give practical salinity (PSS-78, units '1')")
    med = _median(s)
    if np.isfinite(med) and med > SALINITY_CONDUCTIVITY_MEDIAN:
        raise UnitsError(
            source,
            f"{var('salinity')} has median {med:.4g} (> {SALINITY_CONDUCTIVITY_MEDIAN:g}); "
            "the values look like conductivity in mS/cm",
            "give practical salinity (PSS-78)",
        )
    return out


def depth_to_pressure(
    depth: NDArray[np.float64], latitude: NDArray[np.float64]
) -> NDArray[np.float64]:
    """Sea pressure (dbar) from depth (m, positive down) with TEOS-10 ``gsw.p_from_z``.

    Parameters
    ----------
    depth : ndarray of shape (n_levels,)
        Depth below the sea surface, m.
    latitude : ndarray of shape (n_levels,)
        Latitude of each level, degrees north (NaN latitude gives NaN pressure).

    Returns
    -------
    ndarray of shape (n_levels,)
        Sea pressure, dbar.
    """
    import gsw

    return np.asarray(gsw.p_from_z(-np.asarray(depth, float), np.asarray(latitude, float)),
                      dtype=np.float64)


_TIME_UNITS = (("s", 1_000_000_000), ("ms", 1_000_000), ("us", 1_000), ("ns", 1))


def time_resolution(times: NDArray[np.datetime64]) -> str:
    """Coarsest of ``s``, ``ms``, ``us``, ``ns`` that represents every time exactly."""
    ns = np.asarray(times, dtype="datetime64[ns]")
    ok = ~np.isnat(ns)
    iv = ns[ok].astype(np.int64)
    for unit, step in _TIME_UNITS:
        if not (iv % step).any():
            return unit
    return "ns"


def format_times(times: NDArray[np.datetime64]) -> NDArray[np.str_]:
    """ISO 8601 UTC strings ending in ``Z`` (empty for NaT), at the coarsest exact resolution.

    Examples
    --------
    >>> format_times(np.array(["2024-01-14T10:22:00"], dtype="datetime64[ns]")).tolist()
    ['2024-01-14T10:22:00Z']
    """
    ns = np.asarray(times, dtype="datetime64[ns]")
    unit = time_resolution(ns)
    s = np.char.add(np.datetime_as_string(ns, unit=unit), "Z")
    return np.where(np.isnat(ns), "", s)


def to_ns(times: Any) -> NDArray[np.datetime64]:
    """Return naive-UTC ``datetime64[ns]`` values from pandas/numpy datetimes."""
    import pandas as pd

    t = pd.DatetimeIndex(times)
    if t.tz is not None:
        t = t.tz_convert("UTC").tz_localize(None)
    return np.asarray(t.as_unit("ns").to_numpy(), dtype="datetime64[ns]")


def utc_timestamp() -> str:
    """Return the UTC time as ``YYYY-MM-DDThh:mm:ssZ`` for history and ``date_created``.

    When the environment variable ``SOURCE_DATE_EPOCH`` holds an integer (seconds since
    1970-01-01 UTC; the reproducible-builds convention, reproducible-builds.org), that time
    is used instead, so that reruns write byte-identical NetCDF files.

    Returns
    -------
    str

    Raises
    ------
    QCFlagError
        If ``SOURCE_DATE_EPOCH`` is set but is not a non-negative integer.
    """
    import os
    from datetime import UTC, datetime

    epoch = os.environ.get("SOURCE_DATE_EPOCH", "").strip()
    if epoch:
        if not epoch.isdigit():
            from qcflag.exceptions import QCFlagError

            raise QCFlagError(f"SOURCE_DATE_EPOCH={epoch!r} is not a whole number of seconds "
                              "since 1970-01-01; unset it or give e.g. 1700000000")
        when = datetime.fromtimestamp(int(epoch), UTC)
    else:
        when = datetime.now(UTC)
    return when.strftime("%Y-%m-%dT%H:%M:%SZ")
