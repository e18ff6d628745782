"""Argo-format profile NetCDF (format 3.1; Argo User's Manual v3.43.0).

What is read (../shared/reference/formats-and-conventions.md section 3):

* per profile, ``DATA_MODE`` picks the values: ``R`` -> ``<PARAM>`` and ``<PARAM>_QC``;
  ``A``/``D`` -> ``<PARAM>_ADJUSTED`` and ``<PARAM>_ADJUSTED_QC`` (section 3.3);
* one-character QC flags, ``" "`` (fill) read as "no flag" (``NO_FLAG``), never as 0;
* fill value 99999 compared with a float32 tolerance; ``JULD`` is days since
  1950-01-01 00:00:00 UTC, rounded to the nearest second (Argo dates are given to the second
  in ``YYYYMMDDHHMISS`` fields);
* levels whose chosen pressure is fill are dropped (this removes the trailing padding of
  multi-profile files); profiles left without levels are dropped.

Profile metadata: ``profile_id = "<PLATFORM_NUMBER>_<CYCLE:03d>"`` with a trailing ``D`` for
descending profiles (the GDAC file-name convention), ``cruise`` = the platform number,
``platform = "Argo float <number>"``, plus columns ``instrument = "float"``, ``data_mode``
and ``cycle_number``. The flag scheme is always ``argo``.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd

from qcflag.exceptions import InputFileError, QCFlagError
from qcflag.io.common import normalise_units
from qcflag.profiles import ProfileBatch
from qcflag.schemes import NO_FLAG, decode

if TYPE_CHECKING:
    import xarray as xr
    from numpy.typing import NDArray

__all__ = ["from_argo"]

PARAMS = {"pressure": "PRES", "temperature": "TEMP", "salinity": "PSAL"}
ARGO_FILL = 99999.0
_EPOCH = np.datetime64("1950-01-01T00:00:00", "ns")


def _chars(ds: Any, name: str, n_prof: int) -> NDArray[np.object_]:
    """Per-profile text of an Argo char variable (blank where absent)."""
    if name not in ds.variables:
        return np.full(n_prof, "", dtype=object)
    raw = np.asarray(ds[name].values)
    if raw.dtype.kind == "S":
        if raw.ndim == 2:
            raw = np.ascontiguousarray(raw).view(f"S{raw.shape[1]}").reshape(raw.shape[0])
        raw = np.char.decode(raw.astype("S"), "ascii", errors="replace")
    out = np.array([str(v).strip("\x00 ") for v in np.asarray(raw).ravel()], dtype=object)
    return out.reshape(-1)[:n_prof] if out.size >= n_prof else np.resize(out, n_prof)


def _values(ds: Any, name: str, shape: tuple[int, int], source: str) -> NDArray[np.float64]:
    if name not in ds.variables:
        return np.full(shape, np.nan)
    var = ds[name]
    arr = np.asarray(var.values)
    if arr.dtype.kind not in "fiu":
        raise InputFileError(source, f"variable {name!r} is not numeric", "check the file")
    arr = arr.astype(np.float64).reshape(shape)
    fill = var.attrs.get("_FillValue", var.encoding.get("_FillValue", ARGO_FILL))
    fill = float(np.asarray(fill).ravel()[0])
    return np.where(np.abs(arr - fill) <= abs(fill) * 1e-6, np.nan, arr)


def _qc(ds: Any, name: str, shape: tuple[int, int], source: str) -> NDArray[np.int8]:
    if name not in ds.variables:
        return np.full(shape, NO_FLAG, dtype=np.int8)
    raw = np.asarray(ds[name].values)
    if raw.dtype.kind == "S":
        b = np.ascontiguousarray(raw.astype("S1")).view(np.uint8).astype(np.int16)
    elif raw.dtype.kind in "OU":
        b = np.array([ord((str(v) or " ")[0]) for v in raw.ravel()], dtype=np.int16)
    else:
        raise InputFileError(source, f"variable {name!r} is not a char flag variable",
                             "check the file")
    b = b.reshape(shape)
    codes = np.where((b == 32) | (b == 0), NO_FLAG, np.where((b >= 48) & (b <= 57), b - 48, b))
    codes = np.clip(codes, -1, 127).astype(np.int8)
    decode(codes, "argo", where=f"{source}: variable {name!r}")
    return codes


def from_argo(ds: xr.Dataset, *, source: str = "<dataset>") -> ProfileBatch:
    """Read an Argo-format profile dataset (raw or decoded) into a batch.

    Parameters
    ----------
    ds : xarray.Dataset
        Argo profile file contents (``N_PROF`` x ``N_LEVELS``).
    source : str
        Name of the file, for messages.

    Returns
    -------
    ProfileBatch

    Raises
    ------
    InputFileError
        If a core variable is missing or malformed, or no level has a pressure.
    """
    if "N_LEVELS" not in ds.dims:
        raise InputFileError(source, "Argo file without an N_LEVELS dimension",
                             "give an Argo profile file (not a trajectory or meta file)")
    n_prof, n_lev = int(ds.sizes["N_PROF"]), int(ds.sizes["N_LEVELS"])
    shape = (n_prof, n_lev)
    for p in ("PRES", "TEMP"):
        if p not in ds.variables:
            raise InputFileError(source, f"Argo file without variable {p}",
                                 "give a core Argo profile file")
    mode = _chars(ds, "DATA_MODE", n_prof)
    bad_mode = ~np.isin(mode, ["R", "A", "D"])
    if bad_mode.any():
        raise InputFileError(source, f"DATA_MODE {mode[bad_mode][0]!r} is not R, A or D",
                             "check the file")
    adjusted = np.isin(mode, ["A", "D"])[:, None]
    values: dict[str, NDArray[np.float64]] = {}
    flags: dict[str, NDArray[np.int8]] = {}
    units: dict[str, Any] = {}
    for key, p in PARAMS.items():
        raw = _values(ds, p, shape, source)
        adj = _values(ds, f"{p}_ADJUSTED", shape, source)
        values[key] = np.where(adjusted, adj, raw)
        flags[key] = np.where(adjusted, _qc(ds, f"{p}_ADJUSTED_QC", shape, source),
                              _qc(ds, f"{p}_QC", shape, source)).astype(np.int8)
        units[key] = ds[p].attrs.get("units") if p in ds.variables else None
    present = np.isfinite(values["pressure"])
    counts = present.sum(axis=1)
    keep = counts > 0
    if not keep.any():
        raise InputFileError(source, "no level has a pressure value",
                             "check PRES / PRES_ADJUSTED in the file")
    flat = {k: v[present] for k, v in values.items()}
    notes: list[str] = []
    conv = normalise_units(flat, units, source=source,
                           names=dict(PARAMS), notes=notes)
    platform = _chars(ds, "PLATFORM_NUMBER", n_prof)
    cycle = (_values(ds, "CYCLE_NUMBER", (n_prof, 1), source)[:, 0]
             if "CYCLE_NUMBER" in ds.variables else np.full(n_prof, np.nan))
    direction = _chars(ds, "DIRECTION", n_prof)
    cyc_txt = np.array([f"{int(c):03d}" if np.isfinite(c) else "NA" for c in cycle],
                       dtype=object)
    pid = platform + "_" + cyc_txt + np.where(direction == "D", "D", "")
    juld = ds["JULD"] if "JULD" in ds.variables else None
    if juld is not None and np.asarray(juld.values).dtype.kind == "M":
        times = np.asarray(juld.values).astype("datetime64[ns]")
    elif juld is not None:
        days = _values(ds, "JULD", (n_prof, 1), source)[:, 0]
        days[np.abs(days - 999999.0) < 1e-3] = np.nan
        secs = np.round(days * 86400.0)
        ok = np.isfinite(secs)
        times = np.full(n_prof, np.datetime64("NaT"), dtype="datetime64[ns]")
        times[ok] = _EPOCH + (secs[ok].astype(np.int64) * 1_000_000_000).astype("timedelta64[ns]")
    else:
        times = np.full(n_prof, np.datetime64("NaT"), dtype="datetime64[ns]")
    lat = _values(ds, "LATITUDE", (n_prof, 1), source)[:, 0]
    lon = _values(ds, "LONGITUDE", (n_prof, 1), source)[:, 0]
    profiles = pd.DataFrame({
        "profile_id": pid,
        "cruise": platform,
        "time": times,
        "latitude": lat,
        "longitude": lon,
        "platform": "Argo float " + platform,
        "instrument": np.full(n_prof, "float", dtype=object),
        "data_mode": mode,
        "cycle_number": pd.array(
            [int(c) if np.isfinite(c) else None for c in cycle], dtype="Int64"),
    })[keep]
    offsets = np.concatenate([[0], np.cumsum(counts[keep])]).astype(np.int64)
    attrs: dict[str, Any] = {"sources": [source], "layout": "argo"}
    hist = ds.attrs.get("history")
    if hist is not None:
        attrs["history"] = str(hist)
    attrs["global_attrs"] = {k: str(ds.attrs[k]) for k in ("title", "institution", "source",
                                                           "references") if k in ds.attrs}
    if not keep.all():
        attrs["dropped_profiles"] = int((~keep).sum())
        notes.append(f"dropped {int((~keep).sum())} profile(s) with no levels")
    if notes:
        attrs["notes"] = notes
    try:
        return ProfileBatch(
            offsets=offsets,
            pressure=conv["pressure"],
            temperature=conv["temperature"],
            salinity=conv["salinity"],
            profiles=profiles,
            flags={k: v[present] for k, v in flags.items()},
            scheme="argo",
            attrs=attrs,
        )
    except QCFlagError as exc:
        raise InputFileError(source, str(exc)) from None
