"""CF discrete-sampling-geometry profile NetCDF: reader (four layouts) and writer.

Reader
------
:func:`from_dataset` finds variables by ``standard_name`` (falling back to common names),
the profile identifier by ``cf_role = "profile_id"``, manual flags through
``ancillary_variables``, and the layout from the file itself
(../shared/reference/formats-and-conventions.md section 2, after CF-1.13 chapter 9):

* contiguous ragged: a count variable with ``sample_dimension``;
* indexed ragged: an index variable with ``instance_dimension`` (levels grouped by profile,
  file order kept within each);
* incomplete / orthogonal multidimensional: data ``(profile, level)`` with 2-D or 1-D
  pressure; padding levels (pressure, temperature and salinity all missing) are dropped;
* a single profile without an instance dimension.

Argo-format files (``N_PROF`` x ``N_LEVELS``) are recognised and read by
:mod:`qcflag.io.argo`. Profiles left with no level are dropped
(``batch.attrs["dropped_profiles"]``); a file with no level at all is refused.

Writer
------
:func:`to_dataset` / :func:`write_netcdf` produce CF-1.13 contiguous ragged arrays: dimensions
``profile`` and ``obs``; ``row_size(profile)`` with ``sample_dimension = "obs"``; manual flags
as ``byte <var>_qc(obs)`` with ``flag_values``/``flag_meanings`` of the batch scheme and
``_FillValue = -128`` where a level carries no flag; a ``history`` line per CF section 2.6.
Values are written as doubles so that CSV -> NetCDF -> CSV is exact.
"""

from __future__ import annotations

import os
import re
import sys
from collections.abc import Mapping
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd

from qcflag._version import __version__
from qcflag.exceptions import InputFileError, QCFlagError, UnitsError
from qcflag.io.atomic import atomic_output
from qcflag.io.common import (
    AddedColumn,
    depth_to_pressure,
    normalise_units,
    time_resolution,
    to_ns,
    utc_timestamp,
)
from qcflag.profiles import LEVEL_VARIABLES, META_COLUMNS, ProfileBatch
from qcflag.schemes import NO_FLAG, SCHEMES, get_scheme, parse_codes

if TYPE_CHECKING:
    import xarray as xr
    from numpy.typing import NDArray

__all__ = ["from_dataset", "read_netcdf", "to_dataset", "write_netcdf"]

PROFILE_DIM = "profile"
"""Instance dimension written by :func:`to_dataset`."""
OBS_DIM = "obs"
"""Sample (element) dimension written by :func:`to_dataset`."""
FLAG_FILL = np.int8(-128)
"""``_FillValue`` of byte flag variables: the level carries no flag."""

_MAGIC = (b"CDF\x01", b"CDF\x02", b"CDF\x05", b"\x89HDF\r\n\x1a\n")

_STANDARD = {
    "pressure": ("sea_water_pressure", "sea_water_pressure_due_to_sea_water"),
    "depth": ("depth",),
    "temperature": ("sea_water_temperature",),
    "salinity": ("sea_water_practical_salinity", "sea_water_salinity"),
    "latitude": ("latitude",),
    "longitude": ("longitude",),
    "time": ("time",),
}
_NAMES = {
    "pressure": ("pressure", "pres", "ctdprs", "prs"),
    "depth": ("depth", "z"),
    "temperature": ("temperature", "temp", "ctdtmp", "t90"),
    "salinity": ("salinity", "psal", "ctdsal", "sal"),
    "latitude": ("latitude", "lat"),
    "longitude": ("longitude", "lon"),
    "time": ("time",),
    "cruise": ("cruise", "cruise_id", "expocode", "cruise_name"),
    "platform": ("platform", "platform_name", "platform_id", "ship"),
}
_GLOBAL_KEEP = ("title", "institution", "source", "references", "comment", "project",
                "summary", "history")


# --------------------------------------------------------------------------- reading
def _check_magic(path: Path) -> None:
    with path.open("rb") as fh:
        head = fh.read(8)
    if not head:
        raise InputFileError(path, "empty file", "give a NetCDF profile file")
    if not any(head.startswith(m) for m in _MAGIC):
        shown = head[:8].decode("ascii", errors="replace")
        shown = "".join(c if c.isprintable() else "?" for c in shown)
        raise InputFileError(path, f"not a NetCDF file (it starts with {shown!r})",
                             "if it is CSV, give it a .csv name; else fetch the file again")


_TYPE_SIZE = {1: 1, 2: 1, 3: 2, 4: 4, 5: 4, 6: 8, 7: 1, 8: 2, 9: 4, 10: 8, 11: 8}


class _HeaderError(Exception):
    pass


def _check_classic_header(path: Path) -> None:
    """Refuse a classic (CDF-1/2/5) header whose counts or offsets cannot fit the file.

    The NetCDF library trusts these numbers and can spend minutes on a corrupt header, so
    they are checked first (format: NetCDF Users Guide, "The NetCDF Classic Format
    Specification", from memory).
    """
    size = path.stat().st_size
    with path.open("rb") as fh:
        if fh.read(3) != b"CDF":
            return  # NetCDF-4 (HDF5): the library checks its own header
        fh.seek(0)
        buf = fh.read(min(size, 4 << 20))
    version = buf[3]
    wide = 8 if version == 5 else 4
    pos = [4]

    def take(n: int) -> bytes:
        if pos[0] + n > len(buf):
            raise _HeaderError("header runs past the end of the file")
        out = buf[pos[0]:pos[0] + n]
        pos[0] += n
        return out

    def num(n: int) -> int:
        return int.from_bytes(take(n), "big", signed=False)

    def count() -> int:
        n = num(wide)
        if n > size:
            raise _HeaderError(f"a count of {n} exceeds the file size")
        return n

    def name() -> None:
        n = count()
        take((n + 3) // 4 * 4)

    def attrs() -> None:
        tag, n = num(4), count()
        if tag not in (0, 12) or (tag == 0 and n):
            raise _HeaderError("bad attribute list tag")
        for _ in range(n):
            name()
            t = num(4)
            if t not in _TYPE_SIZE:
                raise _HeaderError(f"unknown type {t}")
            m = count()
            take((m * _TYPE_SIZE[t] + 3) // 4 * 4)

    try:
        num(wide)  # numrecs
        tag, n_dims = num(4), count()
        if tag not in (0, 10):
            raise _HeaderError("bad dimension list tag")
        for _ in range(n_dims):
            name()
            num(wide)
        attrs()
        tag, n_vars = num(4), count()
        if tag not in (0, 11):
            raise _HeaderError("bad variable list tag")
        for _ in range(n_vars):
            name()
            nd = count()
            for _ in range(nd):
                if num(wide) >= max(n_dims, 1):
                    raise _HeaderError("a variable uses an unknown dimension")
            attrs()
            if num(4) not in _TYPE_SIZE:
                raise _HeaderError("unknown variable type")
            num(wide)  # vsize
            begin = num(4 if version == 1 else 8)
            if begin > size:
                raise _HeaderError("variable data starts past the end of the file")
    except _HeaderError as exc:
        if "past the end" in str(exc) and len(buf) < size:
            return  # header longer than what was read: leave it to the library
        raise InputFileError(path, f"corrupt NetCDF header ({exc})",
                             "the file is probably truncated or damaged; fetch it again"
                             ) from None


def read_netcdf(path: str | os.PathLike[str], *, scheme: str | None = None) -> ProfileBatch:
    """Read a CF DSG profile or Argo-format NetCDF file.

    Parameters
    ----------
    path : path-like
        The file.
    scheme : str, optional
        Flag scale of the manual flags when the file's ``flag_meanings`` do not name one of
        :data:`qcflag.schemes.SCHEMES` (default ``"argo"``).

    Returns
    -------
    ProfileBatch

    Raises
    ------
    InputFileError
        If the file is not NetCDF, is truncated or corrupt, or lacks the variables.
    UnitsError
        If units are unknown or plainly contradicted by the values.
    """
    import xarray as xr

    path = Path(path)
    if path.is_dir():
        raise IsADirectoryError(21, "is a directory", str(path))
    _check_magic(path)
    _check_classic_header(path)
    raw = _open_raw(path)
    if raw is not None:
        try:
            return from_dataset(raw, scheme=scheme, source=str(path))  # type: ignore[arg-type]
        except Exception:  # the xarray path below gives the error (or reads the file)
            pass
    try:
        with xr.open_dataset(path, engine="netcdf4", decode_cf=False, mask_and_scale=False,
                             decode_times=False, cache=False) as ds:
            ds = ds.load()
    except (OSError, RuntimeError, ValueError, KeyError, IndexError, TypeError,
            UnicodeDecodeError, OverflowError, AttributeError) as exc:
        msg = str(exc).strip().splitlines()
        why = msg[0][:160] if msg else type(exc).__name__
        raise InputFileError(path, f"cannot read the NetCDF file ({why})",
                             "it is probably truncated or corrupt; fetch it again") from None
    return from_dataset(ds, scheme=scheme, source=str(path))


class _RawVariable:
    """One variable of a file opened by :func:`_open_raw`.

    It offers what :func:`from_dataset` uses of an ``xarray.Variable`` from
    ``open_dataset(decode_cf=False, mask_and_scale=False)``.
    """

    __slots__ = ("attrs", "dims", "encoding", "name", "values")

    def __init__(self, name: str, dims: tuple[str, ...], attrs: dict[str, Any],
                 encoding: dict[str, Any], values: NDArray[Any]) -> None:
        self.name, self.dims, self.attrs, self.encoding = name, dims, attrs, encoding
        self.values = values

    @property
    def dtype(self) -> np.dtype[Any]:
        return self.values.dtype

    @property
    def ndim(self) -> int:
        return self.values.ndim

    @property
    def shape(self) -> tuple[int, ...]:
        return self.values.shape


class _RawDataset:
    """A file's root group read eagerly with netCDF4, shaped like the xarray dataset."""

    def __init__(self, variables: dict[str, _RawVariable], attrs: dict[str, Any],
                 sizes: dict[str, int]) -> None:
        self.variables, self.attrs, self.sizes = variables, attrs, sizes
        self.dims = sizes

    def __getitem__(self, name: str) -> _RawVariable:
        return self.variables[name]


def _open_raw(path: Path) -> _RawDataset | None:
    """Read a CF contiguous ragged file straight through netCDF4, or None to use xarray.

    xarray's per-variable wrapping, locking and file-manager round trips cost ~3 ms per
    variable; this reads the same raw values and attributes that
    ``xr.open_dataset(path, decode_cf=False, mask_and_scale=False).load()`` gives
    (attributes as ``getncattr`` returns them, the ``_FillValue`` of text as bytes,
    ``least_significant_digit`` moved to the encoding, variable-length strings as object
    arrays, char arrays as ``S1``, dimensions as used by the variables). Files it is not
    sure about (Argo layout, no count variable, enum/compound/vlen types, a variable named
    like a dimension, any read error) get None, and the caller goes through xarray.
    """
    try:
        import netCDF4

        with netCDF4.Dataset(os.fspath(path), mode="r") as nc:
            if "N_PROF" in nc.dimensions:
                return None
            found: list[tuple[str, Any, dict[str, Any]]] = []
            for name, var in nc.variables.items():
                attrs = {k: var.getncattr(k) for k in var.ncattrs()}
                found.append((name, var, attrs))
            if not any("sample_dimension" in a for _, _, a in found):
                return None
            dim_names = set(nc.dimensions)
            variables: dict[str, _RawVariable] = {}
            sizes: dict[str, int] = {}
            for name, var, attrs in found:
                if name in dim_names or not isinstance(name, str):
                    return None
                dt = var.datatype
                vlen_str = isinstance(dt, netCDF4.VLType) and var.dtype is str
                if not vlen_str and not isinstance(dt, np.dtype):
                    return None
                var.set_auto_maskandscale(False)
                var.set_auto_chartostring(False)
                dims = tuple(var.dimensions)
                shape = tuple(int(n) for n in var.shape)
                values = _read_whole(var, shape)
                if vlen_str:
                    values = np.asarray(values, dtype=object).reshape(shape)
                values = np.asarray(values)
                if values.shape != shape or isinstance(values, np.ma.MaskedArray):
                    return None
                if values.dtype.kind == "S" and "_FillValue" in attrs:
                    attrs["_FillValue"] = np.bytes_(attrs["_FillValue"])
                encoding: dict[str, Any] = {"dtype": var.dtype}
                if "least_significant_digit" in attrs:
                    encoding["least_significant_digit"] = attrs.pop("least_significant_digit")
                for d, n in zip(dims, shape, strict=True):
                    sizes.setdefault(d, n)
                variables[name] = _RawVariable(name, dims, attrs, encoding, values)
            gattrs = {k: nc.getncattr(k) for k in nc.ncattrs()}
    except Exception:  # whatever went wrong, the xarray path reports it properly
        return None
    return _RawDataset(variables, gattrs, sizes)


def _whole(shape: tuple[int, ...]) -> tuple[NDArray[np.intp], ...]:
    """``start, count, stride`` of a whole variable for netCDF4's ``_get``/``_put``."""
    nd = len(shape)
    return np.zeros(nd, np.intp), np.array(shape, np.intp), np.ones(nd, np.intp)


def _read_whole(var: Any, shape: tuple[int, ...]) -> Any:
    """``var[...]`` of a netCDF4 variable with auto mask/scale and char-to-string off.

    ``Variable.__getitem__`` spends ~100 us of Python per call working out the slice and
    checking scale attributes that are off here; for a whole variable of rank >= 1 it ends
    in ``Variable._get(start, count, stride)``, called here directly (same array, same
    dtype; an empty variable is not read at all, as there).
    """
    if not shape or 0 in shape:
        return var[...]
    return var._get(*_whole(shape))


def _attr(var: Any, key: str) -> Any:
    val = var.attrs.get(key)
    if val is None:
        val = var.encoding.get(key)
    return val


def _text(val: Any) -> str:
    if isinstance(val, bytes):
        return val.decode("utf-8", errors="replace")
    if isinstance(val, np.ndarray):
        return " ".join(_text(v) for v in val.ravel())
    return "" if val is None else str(val)


def _floats(var: Any, source: str) -> NDArray[np.float64]:
    """Values of a numeric variable as float64 with fill/missing values as NaN."""
    raw = np.asarray(var.values)
    if raw.dtype.kind not in "fiub":
        raise InputFileError(source, f"variable {var.name!r} is not numeric ({raw.dtype})",
                             "store it as a number")
    arr = raw.astype(np.float64)
    for key in ("_FillValue", "missing_value"):
        fill = var.attrs.get(key)
        if fill is None:
            continue
        for f in np.atleast_1d(np.asarray(fill, dtype=np.float64)):
            if np.isnan(f):
                continue
            tol = abs(f) * 1e-6 if raw.dtype.kind == "f" else 0.0
            arr[np.abs(arr - f) <= tol] = np.nan
    scale = var.attrs.get("scale_factor")
    offset = var.attrs.get("add_offset")
    if scale is not None:
        arr = arr * float(np.asarray(scale).ravel()[0])
    if offset is not None:
        arr = arr + float(np.asarray(offset).ravel()[0])
    return arr


def _text_codes(var: Any, ndim: int) -> tuple[NDArray[np.intp], NDArray[np.object_]] | None:
    """Codes into a table of distinct decoded, stripped texts; None if `var` is not text.

    Char arrays are joined along their last dimension. Each distinct stored value is
    decoded and stripped once (per-level text repeats a few values, mostly the empty one,
    which is found by one vectorised comparison); values that become equal after stripping
    share one table entry, so the table holds no duplicates.
    """
    raw = np.asarray(var.values)
    if raw.dtype.kind == "S" and raw.ndim == ndim + 1:
        width = raw.shape[-1]
        raw = np.ascontiguousarray(raw).view(f"S{max(width, 1)}").reshape(raw.shape[:-1])
    if raw.dtype.kind not in "SOU":
        return None
    flat = raw.ravel()
    if raw.dtype.kind == "S":  # fixed-width bytes: the empty value compared as bytes
        codes, uniq = _factorize_text(flat, empty=b"")
    else:
        codes, uniq = _factorize_text(np.asarray(flat, dtype=object))
    texts = [_decoded(u).strip("\x00 ") for u in uniq] or [""]
    table, inverse = np.unique(np.array(texts, dtype=object), return_inverse=True)
    return inverse.ravel()[codes].reshape(raw.shape), table


def _strings(var: Any, ndim: int) -> NDArray[np.object_]:
    """Text values with `ndim` dimensions (char arrays joined along their last dimension)."""
    coded = _text_codes(var, ndim)
    if coded is not None:
        codes, table = coded
        return table[codes]
    raw = np.asarray(var.values)
    if raw.dtype.kind in "iu":
        out = raw.astype(str).astype(object)
    elif raw.dtype.kind == "f":
        vals = _floats(var, "")
        out = np.where(np.isfinite(vals) & (vals == np.round(vals)),
                       np.nan_to_num(vals).astype(np.int64).astype(str),
                       vals.astype(str)).astype(object)
        out[~np.isfinite(vals)] = ""
    else:
        out = raw.astype(str).astype(object)
    flat = np.array([s.strip("\x00 ") for s in out.ravel()], dtype=object)
    return flat.reshape(out.shape)


def _decoded(value: Any) -> str:
    return value.decode("utf-8", "replace") if isinstance(value, bytes) else str(value)


def _times(var: Any, source: str) -> NDArray[np.datetime64]:
    import xarray as xr

    raw = np.asarray(var.values)
    if raw.dtype.kind == "M":
        return raw.astype("datetime64[ns]")
    units = _attr(var, "units")
    if units is None or "since" not in str(units):
        raise UnitsError(source, f"time variable {var.name!r} has units {units!r}",
                         "give CF time units such as 'days since 1950-01-01 00:00:00'")
    attrs = {k: v for k, v in var.attrs.items()
             if k in ("units", "calendar", "_FillValue", "missing_value")}
    fast = _cf_times_numpy(raw.ravel(), attrs)
    if fast is not None:
        return fast.reshape(raw.shape)
    try:
        dec = xr.decode_cf(xr.Dataset({"t": (("n",), raw.ravel(), attrs)}))["t"].values
    except (ValueError, TypeError, OverflowError) as exc:
        raise UnitsError(source, f"time variable {var.name!r} cannot be decoded ({exc})",
                         "use a standard calendar and CF time units") from None
    if dec.dtype.kind != "M":
        raise UnitsError(source, f"time variable {var.name!r} uses a non-standard calendar",
                         "convert times to the standard (Gregorian) calendar")
    return dec.astype("datetime64[ns]").reshape(raw.shape)


_TIME_STEP_NS = {"days": 86_400 * 10**9, "hours": 3_600 * 10**9, "minutes": 60 * 10**9,
                 "seconds": 10**9, "milliseconds": 10**6, "microseconds": 10**3,
                 "nanoseconds": 1}
_TIME_UNITS = re.compile(r"\s*([A-Za-z]+) since (\d{4}-\d\d-\d\d)"
                         r"(?:[ T](\d\d:\d\d:\d\d)(?:\.0*)?Z?)?\s*")
_NS_MIN, _NS_MAX = -(2**63) + 1, 2**63 - 1  # datetime64[ns] range (int64 min is NaT)


def _cf_times_numpy(raw: NDArray[Any], attrs: Mapping[str, Any]
                    ) -> NDArray[np.datetime64] | None:
    """Decode 1-D CF times as ``xr.decode_cf`` does, in numpy; None where unsure.

    Handles integer and float values with units ``<days|hours|...|nanoseconds> since
    YYYY-MM-DD[ HH:MM:SS]`` (``T`` or space, optional ``.0`` and ``Z``), a standard
    calendar, a reference time in the datetime64[ns] range and ``_FillValue`` /
    ``missing_value``, with xarray's arithmetic (2024-2026, default ``time_unit="ns"``):
    fill values compared after the cast to int64 (integers) or in the float type;
    integers multiplied exactly into nanoseconds; floats multiplied in float64 by the
    whole number of nanoseconds per unit and truncated to int64; NaN, filled values and
    (integers) int64 min become NaT. Anything else (another unit, calendar or reference
    format, offsets or results outside the datetime64[ns] range, packed values) returns
    None and is left to xarray, whose Dataset building costs ~4 ms per file.
    """
    if set(attrs) - {"units", "calendar", "_FillValue", "missing_value"} or raw.ndim != 1:
        return None
    kind = raw.dtype.kind
    if kind not in "iuf" or raw.dtype.itemsize > 8:
        return None
    cal = attrs.get("calendar")
    cal = "standard" if cal is None else cal
    if not isinstance(cal, str) or cal.lower() not in ("standard", "gregorian",
                                                       "proleptic_gregorian"):
        return None
    units = attrs.get("units")
    m = _TIME_UNITS.fullmatch(units) if isinstance(units, str) else None
    if m is None:
        return None
    word = m.group(1).lower()
    step = _TIME_STEP_NS.get(word if word.endswith("s") else word + "s")
    if step is None:
        return None
    try:
        ref = int(np.datetime64(f"{m.group(2)}T{m.group(3) or '00:00:00'}", "s")
                  .astype(np.int64)) * 10**9
    except (ValueError, OverflowError):
        return None
    if not _NS_MIN <= ref <= _NS_MAX or raw.size == 0:
        return None  # (a datetime64[ns] reference is after 1582-10-15 in any calendar)
    fills = []
    for key in ("missing_value", "_FillValue"):
        if key in attrs:
            vals = [fv for fv in np.ravel(attrs[key]) if not pd.isnull(fv)]
            if not vals and kind in "iu":
                continue  # xarray drops a NaN fill of integers
            fills += vals
    if kind in "iu":
        if kind == "u" and raw.size and int(raw.max()) > _NS_MAX:
            return None
        num = raw.astype(np.int64)
        nat = num == np.iinfo(np.int64).min
    else:
        num = np.array(raw, dtype=raw.dtype, copy=True)
        nat = np.zeros(raw.shape, dtype=bool)
    for fv in fills:
        nat |= np.asarray(num == fv, dtype=bool)
    if kind == "f":
        nat |= np.isnan(num)
        with np.errstate(invalid="ignore", over="ignore"):
            scaled = num.astype(np.float64) * np.int64(step)
        ok = scaled[~nat]
        if ok.size and not (np.isfinite(ok).all() and np.abs(ok).max() < 2.0**63):
            return None
        ticks = np.zeros(raw.shape, dtype=np.int64)
        ticks[~nat] = ok.astype(np.int64)
        lo = int(ticks[~nat].min()) if ok.size else 0
        hi = int(ticks[~nat].max()) if ok.size else 0
    else:
        ok = num[~nat]
        lo = int(ok.min()) * step if ok.size else 0
        hi = int(ok.max()) * step if ok.size else 0
        if not (lo >= _NS_MIN and hi <= _NS_MAX):
            return None  # the offsets themselves must fit in int64 nanoseconds
        ticks = np.where(nat, 0, num) * np.int64(step)
    if not (ref + lo >= _NS_MIN and ref + hi <= _NS_MAX):
        return None
    out = ticks + np.int64(ref)
    out[nat] = np.iinfo(np.int64).min
    return out.view("datetime64[ns]")


def _find(ds: Any, key: str, exclude: set[str]) -> str | None:
    """Name of the variable holding `key`, by standard_name, then by common names."""
    for sn in _STANDARD.get(key, ()):
        for name, var in ds.variables.items():
            if name in exclude:
                continue
            std = _text(var.attrs.get("standard_name")).strip()
            if std == sn and "adjusted" not in str(name).lower():
                return str(name)
    lower = {str(n).lower(): str(n) for n in ds.variables if n not in exclude}
    for alias in _NAMES.get(key, ()):
        if alias in lower:
            var = ds[lower[alias]]
            if "status_flag" in _text(var.attrs.get("standard_name")):
                continue
            return lower[alias]
    return None


def _flag_rank(name: str, var: Any) -> int:
    std = _text(var.attrs.get("standard_name")).strip()
    if name.endswith("_flag_auto") or "_flag_auto" in name:
        return 0
    if std == "quality_flag":
        return 4
    if std == "aggregate_quality_flag":
        return 3
    if std == "status_flag" or std.endswith(" status_flag"):
        return 2
    if not std and (name.lower().endswith(("_qc", "_flag", "_flag_w"))
                    or "flag_values" in var.attrs):
        return 1
    return 0


def _flag_var(ds: Any, data_name: str) -> str | None:
    names = _text(ds[data_name].attrs.get("ancillary_variables")).split()
    cands = [(n, _flag_rank(n, ds[n])) for n in names if n in ds.variables]
    cands = [c for c in cands if c[1] > 0]
    if not cands:
        return None
    return max(cands, key=lambda c: c[1])[0]


def _detect_scheme(ds: Any, flag_names: list[str], source: str) -> str | None:
    found: dict[str, str] = {}
    for name in flag_names:
        var = ds[name]
        meanings = _text(var.attrs.get("flag_meanings")).split()
        if not meanings:
            continue
        values = var.attrs.get("flag_values")
        for sch in SCHEMES.values():
            if sorted(meanings) != sorted(sch.meanings):
                continue
            if values is not None:
                vals = np.atleast_1d(np.asarray(values))
                if vals.dtype.kind in "SU":
                    vals = np.array([ord(_text(v)[:1] or " ") if not _text(v).isdigit()
                                     else int(_text(v)) for v in vals])
                if len(vals) != len(meanings) or dict(
                    zip(meanings, vals.astype(int).tolist(), strict=True)
                ) != dict(zip(sch.meanings, sch.values.astype(int).tolist(), strict=True)):
                    continue
            found[name] = sch.name
            break
    schemes = set(found.values())
    if len(schemes) > 1:
        raise InputFileError(source, f"flag variables use different flag scales {found}",
                             "convert the flags to one scale")
    return schemes.pop() if schemes else None


def _flag_codes(var: Any, scheme: str, source: str) -> NDArray[np.int8]:
    raw = np.asarray(var.values)
    where = f"{source}: variable {var.name!r}"
    if raw.dtype.kind == "S":
        return _char_codes(raw, scheme, where)
    if raw.dtype.kind in "iu":
        arr = raw.astype(np.int64)
        fill = _attr(var, "_FillValue")
        if fill is not None:
            arr = np.where(arr == int(np.asarray(fill).ravel()[0]), NO_FLAG, arr)
        miss = var.attrs.get("missing_value")
        if miss is not None:
            arr = np.where(np.isin(arr, np.atleast_1d(np.asarray(miss)).astype(np.int64)),
                           NO_FLAG, arr)
        return _validate_codes(arr, scheme, where)
    if raw.dtype.kind == "f":
        arr = _floats(var, source)
        if (np.isfinite(arr) & (arr != np.round(arr))).any():
            raise InputFileError(source, f"variable {var.name!r} holds non-integer flags",
                                 "store flags as byte codes")
        return _validate_codes(np.where(np.isfinite(arr), arr, NO_FLAG).astype(np.int64),
                               scheme, where)
    return parse_codes(_strings(var, raw.ndim).astype(str), scheme, where=where)


def _validate_codes(arr: NDArray[np.int64], scheme: str, where: str) -> NDArray[np.int8]:
    bad = (arr < -1) | (arr > 127)
    if bad.any():
        valid = " ".join(c.code for c in get_scheme(scheme).codes)
        raise QCFlagError(f"{where}: flag code {int(arr[bad][0])} is not in the "
                          f"{get_scheme(scheme).title} scale (valid: {valid}); "
                          "give the right --scheme")
    out = arr.astype(np.int8)
    from qcflag.schemes import decode

    decode(out, scheme, where=where)
    return out


def _char_codes(raw: NDArray[np.bytes_], scheme: str, where: str) -> NDArray[np.int8]:
    """Convert one-character flags (``b"1"``, ``b" "``) to stored codes, vectorised."""
    b = np.ascontiguousarray(raw, dtype="S1").view(np.uint8).astype(np.int64)
    out = np.where((b == 32) | (b == 0), NO_FLAG, np.where((b >= 48) & (b <= 57), b - 48, b))
    return _validate_codes(out, scheme, where)


def from_dataset(
    ds: xr.Dataset, *, scheme: str | None = None, source: str | None = None
) -> ProfileBatch:
    """Build a batch from an in-memory dataset (CF DSG profiles or Argo format).

    Parameters
    ----------
    ds : xarray.Dataset
        Decoded or raw (``decode_cf=False``) dataset; it is not modified.
    scheme : str, optional
        Flag scale used when the flag metadata names none (default ``"argo"``).
    source : str, optional
        Name of the file, for messages and ``batch.attrs["sources"]``.

    Returns
    -------
    ProfileBatch

    Raises
    ------
    InputFileError
        Missing variables, inconsistent layout, no levels.
    UnitsError
        Unknown or contradicted units.
    """
    src = source or "<dataset>"
    if "N_PROF" in ds.dims and ("DATA_MODE" in ds.variables or "PLATFORM_NUMBER" in ds.variables
                                or _text(ds.attrs.get("Conventions")).startswith("Argo")):
        from qcflag.io.argo import from_argo

        return from_argo(ds, source=src)
    try:
        return _from_cf(ds, scheme=scheme, source=src)
    except QCFlagError:
        raise
    except (ValueError, IndexError, KeyError, TypeError) as exc:
        raise InputFileError(src, f"inconsistent profile layout ({str(exc)[:160]})",
                             "check the CF DSG count/index variables and dimensions") from None


def _from_cf(ds: Any, *, scheme: str | None, source: str) -> ProfileBatch:
    used: set[str] = set()
    names: dict[str, str | None] = {}
    for key in ("temperature", "salinity", "pressure", "latitude", "longitude", "time"):
        names[key] = _find(ds, key, used)
        if names[key]:
            used.add(str(names[key]))
    names["depth"] = None
    if names["pressure"] is None:
        names["depth"] = _find(ds, "depth", used)
        if names["depth"]:
            used.add(str(names["depth"]))
    for key, what in (("temperature", "sea_water_temperature"),
                      ("salinity", "sea_water_practical_salinity")):
        if names[key] is None:
            raise InputFileError(source, f"no {key} variable (standard_name {what})",
                                 "add standard_name attributes to the data variables")
    if names["pressure"] is None and names["depth"] is None:
        raise InputFileError(source, "no pressure variable (standard_name sea_water_pressure) "
                             "or depth", "add standard_name attributes")
    zname = str(names["pressure"] or names["depth"])
    tvar = ds[names["temperature"]]
    count = next((str(n) for n, v in ds.variables.items() if "sample_dimension" in v.attrs),
                 None)
    index = next((str(n) for n, v in ds.variables.items() if "instance_dimension" in v.attrs),
                 None)
    pid = next((str(n) for n, v in ds.variables.items()
                if _text(v.attrs.get("cf_role")).strip() == "profile_id"), None)
    notes: list[str] = []
    obs_dim: str | None = None
    full: tuple[str, ...] = ()
    present = np.zeros((0, 0), dtype=bool)
    order = np.zeros(0, dtype=np.int64)
    total = 0
    z_dim = ""
    if count is not None:
        layout = "contiguous"
        inst_dim: str | None = ds[count].dims[0]
        obs_dim = _text(ds[count].attrs["sample_dimension"]).strip()
        counts = np.maximum(np.nan_to_num(_floats(ds[count], source)).astype(np.int64), 0)
        n_obs = int(ds.sizes.get(obs_dim, 0))
        total = int(counts.sum())
        if total > n_obs:
            raise InputFileError(source, f"count variable {count!r} sums to {total} "
                                 f"but dimension {obs_dim!r} has {n_obs}",
                                 "fix row_size or the sample dimension")
        used.add(count)
    elif index is not None:
        layout = "indexed"
        inst_dim = _text(ds[index].attrs["instance_dimension"]).strip()
        obs_dim = ds[index].dims[0]
        n_inst = int(ds.sizes.get(inst_dim, 0))
        idx = np.nan_to_num(_floats(ds[index], source), nan=-1).astype(np.int64)
        valid = np.flatnonzero((idx >= 0) & (idx < n_inst))
        order = valid[np.argsort(idx[valid], kind="stable")]
        counts = np.bincount(idx[valid], minlength=n_inst).astype(np.int64)
        used.add(index)
    else:
        layout = "multidimensional"
        anchor = pid or names["latitude"]
        inst_dim = None
        if anchor is not None:
            avar = ds[anchor]
            base = avar.dims[:-1] if avar.dtype.kind == "S" and avar.ndim >= 1 else avar.dims
            inst_dim = base[0] if base else None
        sample = tuple(tvar.dims)
        if inst_dim is None:
            if len(sample) != 1:
                raise InputFileError(source, f"variable {tvar.name!r} has dimensions {sample} "
                                     "but no profile dimension was found",
                                     "add cf_role=profile_id or a count/index variable")
            z_dim = sample[0]
            full = (z_dim,)
            shape2 = (1, int(ds.sizes[z_dim]))
        else:
            z_dims = [d for d in sample if d != inst_dim]
            if inst_dim not in sample or len(z_dims) != 1:
                raise InputFileError(source, f"variable {tvar.name!r} has dimensions {sample}; "
                                     f"expected ({inst_dim!r}, level)",
                                     "write a CF DSG profile file")
            z_dim = z_dims[0]
            full = (inst_dim, z_dim)
            shape2 = (int(ds.sizes[inst_dim]), int(ds.sizes[z_dim]))
        present = np.zeros(shape2, dtype=bool)

    def grid(var: Any, fn: Any) -> NDArray[Any]:
        vt = var.transpose(*[d for d in full if d in var.dims],
                           *[d for d in var.dims if d not in full])
        arr = np.asarray(fn(vt))
        lead = tuple(d for d in vt.dims if d in full)
        if lead == full:
            return arr.reshape(present.shape)
        if lead == (z_dim,):
            return np.broadcast_to(arr.reshape(1, -1), present.shape)
        raise InputFileError(source, f"variable {var.name!r} has dimensions {var.dims}; "
                             f"expected {full}", "fix the file layout")

    def lvl(var: Any, fn: Any) -> NDArray[Any]:
        if obs_dim is not None:
            dims = tuple(var.dims)
            if var.dtype.kind == "S" and len(dims) == 2:
                dims = dims[:-1]  # a char array: its last dimension is the text length
            if dims != (obs_dim,):
                raise InputFileError(source, f"variable {var.name!r} has dimensions "
                                     f"{var.dims}, expected ({obs_dim!r},)", "fix the layout")
            arr = np.asarray(fn(var))
            return arr[:total] if layout == "contiguous" else arr[order]
        return grid(var, fn)[present]

    if layout == "multidimensional":
        for key in ("pressure", "depth", "temperature", "salinity"):
            if names.get(key):
                present |= np.isfinite(grid(ds[names[key]], lambda v: _floats(v, source)))
        counts = present.sum(axis=1).astype(np.int64)
        if names["pressure"] and ds[names["pressure"]].dims == (z_dim,) and len(full) == 2:
            notes.append("orthogonal multidimensional layout")
    n_prof = counts.size
    heads = np.concatenate([[0], np.cumsum(counts)])[:-1]
    has = counts > 0

    def floats(name: str) -> NDArray[np.float64]:
        return lvl(ds[name], lambda v: _floats(v, source))

    def per_profile(name: str | None, kind: str) -> NDArray[Any] | None:
        if name is None:
            return None
        var = ds[name]
        fn = {"str": lambda v: _strings(v, v.ndim - (1 if v.dtype.kind == "S" else 0)),
              "time": lambda v: _times(v, source),
              "float": lambda v: _floats(v, source)}[kind]
        base = var.dims[:-1] if kind == "str" and var.dtype.kind == "S" and var.ndim else var.dims
        if base == ():
            return np.repeat(np.asarray(fn(var)).reshape(1), n_prof)
        if inst_dim is not None and tuple(base) == (inst_dim,):
            return np.asarray(fn(var))
        vals = lvl(var, fn)
        out = np.empty(n_prof, dtype=vals.dtype)
        out[:] = np.nan if kind == "float" else (np.datetime64("NaT") if kind == "time" else "")
        out[has] = vals[heads[has]]
        return out

    values = {k: floats(str(names[k])) for k in ("temperature", "salinity")}
    lat = per_profile(names["latitude"], "float")
    lon = per_profile(names["longitude"], "float")
    times = per_profile(names["time"], "time")
    if lat is None:
        lat = np.full(n_prof, np.nan)
        notes.append("no latitude variable; latitude missing")
    if lon is None:
        lon = np.full(n_prof, np.nan)
        notes.append("no longitude variable; longitude missing")
    if times is None:
        times = np.full(n_prof, np.datetime64("NaT"), dtype="datetime64[ns]")
        notes.append("no time variable; time missing")
    if names["pressure"]:
        values["pressure"] = floats(str(names["pressure"]))
    else:
        depth = floats(str(names["depth"]))
        dunits = _text(ds[names["depth"]].attrs.get("units")).strip().lower()
        if dunits not in ("", "m", "meter", "meters", "metre", "metres"):
            raise UnitsError(source, f"depth variable {names['depth']!r} has units {dunits!r}",
                             "give depth in metres")
        pidx = np.repeat(np.arange(n_prof), counts)
        values["pressure"] = depth_to_pressure(depth, np.asarray(lat, float)[pidx])
        notes.append(f"pressure computed from depth variable {names['depth']!r} with TEOS-10 "
                     "gsw.p_from_z")
    units = {k: (_attr(ds[names[k]], "units") if names.get(k) else None)
             for k in LEVEL_VARIABLES}
    std = {k: _text(ds[names[k]].attrs.get("standard_name")) if names.get(k) else ""
           for k in LEVEL_VARIABLES}
    var_names = {k: str(names.get(k) or zname) for k in LEVEL_VARIABLES}
    conv = normalise_units(values, units, source=source, names=var_names, standard_names=std,
                           notes=notes)
    # ---- flags
    flag_names = {k: _flag_var(ds, str(names[k])) for k in LEVEL_VARIABLES if names.get(k)}
    flag_names = {k: v for k, v in flag_names.items() if v is not None}
    detected = _detect_scheme(ds, list(flag_names.values()), source)
    sch = get_scheme(detected or scheme or "argo").name
    flags = {k: lvl(ds[v], lambda var: _flag_codes(var, sch, source))
             for k, v in flag_names.items()}
    used |= set(flag_names.values())
    # ---- profile metadata
    pid_vals = per_profile(pid, "str")
    if pid_vals is None:
        pid_vals = np.arange(n_prof).astype(str).astype(object)
        notes.append("no cf_role=profile_id variable; profiles numbered from 0")
    cruise_name = _by_name(ds, "cruise", inst_dim, used)
    cruise = per_profile(cruise_name, "str")
    if cruise is None:
        g = next((ds.attrs[k] for k in ("cruise", "cruise_id", "expocode") if k in ds.attrs),
                 None)
        cruise = np.full(n_prof, _text(g) if g is not None else Path(source).stem, dtype=object)
    platform_name = _by_name(ds, "platform", inst_dim, used, text_only=True)
    platform = per_profile(platform_name, "str")
    if platform is None:
        platform = np.full(n_prof, _text(ds.attrs.get("platform", "")), dtype=object)
    used |= {n for n in (pid, cruise_name, platform_name, names["latitude"],
                         names["longitude"], names["time"]) if n}
    prof_cols: dict[str, Any] = {
        "profile_id": pid_vals.astype(object), "cruise": cruise.astype(object),
        "time": np.asarray(times, dtype="datetime64[ns]"),
        "latitude": np.asarray(lat, float), "longitude": np.asarray(lon, float),
        "platform": platform.astype(object),
    }
    # ---- other variables: profile columns and per-level extras
    extra: dict[str, Any] = {}
    for raw_name, var in ds.variables.items():
        name = str(raw_name)
        if name in used or name in ds.dims:
            continue
        label = _text(var.attrs.get("original_name")) or name
        if label in META_COLUMNS or label in prof_cols or label in extra:
            continue
        dims = tuple(var.dims)
        base = dims[:-1] if var.dtype.kind == "S" and len(dims) > 1 else dims
        nd = len(base)
        if inst_dim is not None and base == (inst_dim,):
            prof_cols[label] = _column(var, 1, source)
        elif (obs_dim is not None and base == (obs_dim,)) or (
                obs_dim is None and full and set(base) == set(full)):
            coded = _text_codes(var, nd) if nd == 1 else None
            if coded is None:
                extra[label] = lvl(var, lambda v, nd=nd: _column(v, nd, source))
            else:  # per-level text repeats a few values: kept as categories
                extra[label] = pd.Categorical.from_codes(lvl(var, lambda v, c=coded[0]: c),
                                                         categories=coded[1])
    profiles = pd.DataFrame(prof_cols)  # one frame, not a column insertion per variable
    # ---- drop empty profiles
    if not has.any():
        raise InputFileError(source, "no levels with data in any profile",
                             "check that the file holds profile data")
    attrs: dict[str, Any] = {"sources": [source]}
    if not has.all():
        attrs["dropped_profiles"] = int((~has).sum())
        notes.append(f"dropped {int((~has).sum())} profile(s) with no levels")
        profiles = profiles[has]
    offsets = np.concatenate([[0], np.cumsum(counts[has])]).astype(np.int64)
    attrs["global_attrs"] = {k: _text(ds.attrs[k]) for k in _GLOBAL_KEEP if k in ds.attrs}
    if "history" in ds.attrs:
        attrs["history"] = _text(ds.attrs["history"])
    attrs["layout"] = layout
    if notes:
        attrs["notes"] = notes
    extra_df = None
    if extra:
        extra_df = pd.DataFrame({k: (v if isinstance(v, pd.api.extensions.ExtensionArray)
                                     else np.asarray(v)) for k, v in extra.items()})
    try:
        return ProfileBatch(
            offsets=offsets, pressure=conv["pressure"], temperature=conv["temperature"],
            salinity=conv["salinity"], profiles=profiles, flags=flags, scheme=sch,
            extra=extra_df, attrs=attrs,
        )
    except QCFlagError as exc:
        raise InputFileError(source, str(exc)) from None


def _shape(ds: Any, dims: tuple[str, ...]) -> tuple[int, ...]:
    return tuple(int(ds.sizes[d]) for d in dims)


def _by_name(ds: Any, key: str, inst_dim: str | None, used: set[str],
             text_only: bool = False) -> str | None:
    lower = {str(n).lower(): str(n) for n in ds.variables if str(n) not in used}
    for alias in _NAMES[key]:
        name = lower.get(alias)
        if name is None:
            continue
        var = ds[name]
        if text_only and var.dtype.kind not in "SUO":
            continue
        dims = var.dims[:-1] if var.dtype.kind == "S" and var.ndim >= 1 else var.dims
        if var.dtype.kind == "S" and var.ndim == 1 and inst_dim is not None \
                and var.dims[0] == inst_dim:
            dims = var.dims
        if dims == () or (inst_dim is not None and dims == (inst_dim,)):
            return name
    return None


def _column(var: Any, ndim: int, source: str) -> Any:
    """Read a carried-over variable as a column: flags as code text, ints nullable, else as is."""
    raw = np.asarray(var.values)
    if raw.dtype.kind in "SUO":
        return _strings(var, ndim)
    if raw.dtype.kind in "iub":
        if "flag_values" in var.attrs and raw.dtype.kind in "iu":
            from qcflag.schemes import format_codes

            arr = raw.astype(np.int64)
            fill = _attr(var, "_FillValue")
            if fill is not None:
                arr = np.where(arr == int(np.asarray(fill).ravel()[0]), NO_FLAG, arr)
            return format_codes(np.clip(arr, -1, 127)).astype(object)
        fill = var.attrs.get("_FillValue")
        if fill is None:  # kept in its stored type (written back the same)
            return raw.astype(np.int8) if raw.dtype.kind == "b" else raw
        mask = raw == np.asarray(fill).astype(raw.dtype)
        out = pd.array(raw.astype(np.int64).ravel(), dtype="Int64")
        out[mask.ravel()] = pd.NA
        return np.asarray(out, dtype=object).reshape(raw.shape) if raw.ndim > 1 else out
    if raw.dtype.kind == "M":
        return raw
    return _floats(var, source)


# --------------------------------------------------------------------------- writing
_TS = re.compile(r"^\d{4}-\d\d-\d\dT\d\d:\d\d:\d\d")


def history_line(history: str | None = None) -> str:
    """One CF history line: ISO 8601 UTC timestamp, ``qcflag <version>:`` and the command.

    Parameters
    ----------
    history : str, optional
        A complete line (kept as is when it starts with an ISO timestamp) or the command
        to record; defaults to the running command line.

    Returns
    -------
    str
    """
    if history and _TS.match(history):
        return history
    ts = utc_timestamp()
    cmd = history or " ".join(["qcflag", *sys.argv[1:]])
    return f"{ts} qcflag {__version__}: {cmd}"


def _nc_name(name: str, taken: set[str]) -> str:
    safe = re.sub(r"[^A-Za-z0-9_.@+-]", "_", str(name)) or "column"
    if not safe[0].isalpha():
        safe = "v_" + safe
    if safe in taken:
        raise QCFlagError(f"column {name!r} clashes with NetCDF variable {safe!r}; rename it")
    return safe


def _column_variable(values: Any, dim: str) -> tuple[NDArray[Any], dict[str, Any]]:
    """Return data and encoding of a carried-over column (numbers stay numbers, rest is text)."""
    s = values if isinstance(values, pd.Series) else pd.Series(values)  # (index unused)
    if isinstance(s.dtype, pd.Int64Dtype | pd.Int32Dtype | pd.Int16Dtype | pd.Int8Dtype):
        fill = np.iinfo(np.int64).min
        return s.to_numpy(dtype=np.int64, na_value=fill), {"_FillValue": fill}
    if s.dtype.kind in "iu":  # in its own type: a carried-over int8 stays int8
        return s.to_numpy(), {}
    if s.dtype.kind == "b":
        return s.to_numpy(dtype=np.int8), {}
    if s.dtype.kind == "f":
        return s.to_numpy(dtype=np.float64), {"_FillValue": np.nan}
    if s.dtype.kind == "M":
        return to_ns(s), {}
    if isinstance(s.dtype, pd.CategoricalDtype) and all(
            type(c) is str for c in s.cat.categories):
        # already coded (per-level text as read): encode each category once, no hashing
        table = np.array([c.encode("utf-8") for c in s.cat.categories] + [b""],
                         dtype=np.bytes_)
        if table.dtype.itemsize == 0:
            table = table.astype("S1")
        return table[s.cat.codes.to_numpy()], {}  # code -1 (missing) is the last entry: ""
    return _text_variable(s.to_numpy(dtype=object))


def _text_variable(values: Any) -> tuple[NDArray[np.bytes_], dict[str, Any]]:
    """Text values as fixed-width UTF-8 bytes (written as a char array), and their encoding.

    Missing values (None, NaN) become ``""``. The conversion runs once per distinct value
    (a per-level column such as the flag reasons repeats a handful of values), and a char
    array is written as one block, where variable-length strings cost one call per level.
    The writer marks the variable ``_Encoding = "utf-8"``.
    """
    flat = np.asarray(values, dtype=object).ravel()
    if flat.size == 0:
        return np.zeros(np.shape(values), dtype="S1"), {}
    codes, uniq = _factorize_text(flat)
    if all(type(u) is str for u in uniq):
        text = uniq  # what fillna("").astype(str) gives back for plain strings
    else:
        text = pd.Series(np.asarray(uniq, dtype=object), dtype=object).fillna("").astype(str)
        text = text.tolist()
    table = np.array([t.encode("utf-8") for t in text], dtype=np.bytes_)
    if table.dtype.itemsize == 0:
        table = table.astype("S1")
    return table[codes].reshape(np.shape(values)), {}


_Spec = tuple[tuple[str, ...], Any, dict[str, Any], dict[str, Any]]
"""One output variable: dimensions, data, attributes, encoding (as for ``xr.Variable``)."""


def _output_variables(
    batch: ProfileBatch,
    added: Mapping[str, AddedColumn] | None,
    history: str | None,
) -> tuple[dict[str, _Spec], dict[str, Any]]:
    """Variables (in writing order) and global attributes of the output file."""
    sch = get_scheme(batch.scheme)
    prof = batch.profiles
    P, OB = PROFILE_DIM, OBS_DIM
    variables: dict[str, _Spec] = {}
    taken: set[str] = set()

    def put(name: str, dims: tuple[str, ...], data: Any, attrs: dict[str, Any],
            encoding: dict[str, Any] | None = None) -> None:
        if getattr(data, "dtype", None) is not None and data.dtype.kind == "S":
            attrs = {**attrs, "_Encoding": "utf-8"}  # text as a UTF-8 char array
        variables[name] = (dims, data, attrs, dict(encoding or {}))
        taken.add(name)

    put("profile_id", (P,), prof["profile_id"].astype(str).to_numpy(dtype=object),
        {"cf_role": "profile_id", "long_name": "profile identifier"})
    put("cruise", (P,), prof["cruise"].astype(str).to_numpy(dtype=object),
        {"long_name": "cruise identifier"})
    put("platform", (P,), prof["platform"].fillna("").astype(str).to_numpy(dtype=object),
        {"long_name": "platform name"})
    times = to_ns(prof["time"])
    unit = {"s": "seconds", "ms": "milliseconds", "us": "microseconds",
            "ns": "nanoseconds"}[time_resolution(times)]
    put("time", (P,), times, {"standard_name": "time", "long_name": "time of the profile",
                              "axis": "T"},
        {"units": f"{unit} since 1970-01-01 00:00:00", "calendar": "standard",
         "dtype": "int64", "_FillValue": np.iinfo(np.int64).min})
    put("latitude", (P,), prof["latitude"].to_numpy(dtype=np.float64),
        {"standard_name": "latitude", "units": "degree_north", "long_name": "latitude"},
        {"_FillValue": np.nan})
    put("longitude", (P,), prof["longitude"].to_numpy(dtype=np.float64),
        {"standard_name": "longitude", "units": "degree_east", "long_name": "longitude"},
        {"_FillValue": np.nan})
    put("row_size", (P,), batch.counts.astype(np.int64),
        {"sample_dimension": OB, "long_name": "number of levels in each profile"})
    coords = "time latitude longitude pressure"
    var_attrs = {
        "pressure": {"standard_name": "sea_water_pressure", "units": "dbar", "axis": "Z",
                     "positive": "down", "long_name": "sea water pressure"},
        "temperature": {"standard_name": "sea_water_temperature", "units": "degree_Celsius",
                        "units_metadata": "temperature: on_scale", "reference_scale": "ITS-90",
                        "long_name": "in-situ sea water temperature", "coordinates": coords},
        "salinity": {"standard_name": "sea_water_practical_salinity", "units": "1",
                     "reference_scale": "PSS-78", "long_name": "practical salinity",
                     "coordinates": coords},
    }
    ancillary: dict[str, list[str]] = {v: [] for v in LEVEL_VARIABLES}
    for v in LEVEL_VARIABLES:
        put(v, (OB,), batch.values(v), dict(var_attrs[v]), {"_FillValue": np.nan})
    for v in LEVEL_VARIABLES:
        if v not in batch.flags:
            continue
        name = f"{v}_qc"
        codes = np.where(batch.flags[v] == NO_FLAG, FLAG_FILL, batch.flags[v]).astype(np.int8)
        put(name, (OB,), codes, {
            "standard_name": "quality_flag",
            "long_name": f"{v} manual quality flag",
            "flag_values": sch.values,
            "flag_meanings": " ".join(sch.meanings),
            "coverage_content_type": "qualityInformation",
            "comment": f"flag scale: {sch.title}",
        }, {"_FillValue": FLAG_FILL})
        ancillary[v].append(name)
    for c in prof.columns:
        if c in META_COLUMNS:
            continue
        nc = _nc_name(c, taken)
        data, enc = _column_variable(prof[c], P)
        put(nc, (P,), data, {"original_name": str(c)} if nc != c else {}, enc)
    added = dict(added or {})
    if batch.extra is not None:
        for c in batch.extra.columns:
            if c in added:
                continue  # a re-run replaces its earlier output
            nc = _nc_name(c, taken)
            data, enc = _column_variable(batch.extra[c], OB)
            put(nc, (OB,), data, {"original_name": str(c)} if nc != c else {}, enc)
    for name, col in added.items():
        vals = np.asarray(col.values)
        if vals.shape != (batch.n_levels,):
            raise QCFlagError(f"added column {name!r}: {vals.shape} values for "
                              f"{batch.n_levels} levels")
        nc = _nc_name(name, taken)
        attrs = {k: v for k, v in col.attrs.items() if k not in ("_FillValue",)}
        enc: dict[str, Any] = {}
        if "flag_values" in attrs and vals.dtype.kind in "iu":
            fill = col.attrs.get("_FillValue", FLAG_FILL)
            vals = np.where(vals == NO_FLAG, fill, vals).astype(np.int8)
            enc["_FillValue"] = np.int8(fill)
            attrs["flag_values"] = np.asarray(attrs["flag_values"], dtype=np.int8)
        elif vals.dtype.kind == "f":
            enc["_FillValue"] = col.attrs.get("_FillValue", np.nan)
        elif vals.dtype.kind in "OUS":
            vals, enc = _text_variable(vals)
        if nc != name:
            attrs["original_name"] = name
        put(nc, (OB,), vals, attrs, enc)
        if col.parent is not None:
            if col.parent not in ancillary:
                raise QCFlagError(f"added column {name!r}: unknown parent {col.parent!r}")
            ancillary[col.parent].append(nc)
    for v, names in ancillary.items():
        if names:
            variables[v][2]["ancillary_variables"] = " ".join(names)
    line = history_line(history)
    g = dict(batch.attrs.get("global_attrs", {}))
    old = batch.attrs.get("history") or g.get("history")
    g["history"] = f"{old.rstrip()}\n{line}" if old else line
    g.setdefault("title", "Hydrographic profiles")
    g["featureType"] = "profile"
    g["Conventions"] = "CF-1.13 ACDD-1.3"
    g["date_created"] = line[:20] if _TS.match(line) else line
    g["qcflag_flag_scheme"] = sch.name
    return variables, {k: g[k] for k in sorted(g)}


def _factorize_text(flat: NDArray[Any], empty: str | bytes = ""
                    ) -> tuple[NDArray[np.intp], list[Any]]:
    """``pd.factorize(flat)`` (codes, distinct values) with the `empty` value set apart first.

    Per-level text (flag reasons, carried-over comments, fault labels) is mostly empty;
    comparing with `empty` in one vectorised pass and hashing only the rest is several
    times faster. Fixed-width bytes are hashed as Python objects.
    """
    try:
        is_empty = np.asarray(flat == empty, dtype=bool)
    except (TypeError, ValueError):  # values whose comparison is not a plain bool
        is_empty = None
    if is_empty is None or is_empty.shape != flat.shape or not is_empty.any():
        codes, uniq = pd.factorize(np.asarray(flat, dtype=object), use_na_sentinel=False)
        return codes, list(uniq)
    codes = np.zeros(flat.size, dtype=np.intp)
    rest = np.flatnonzero(~is_empty)
    uniq: list[Any] = [empty]
    if rest.size:
        sub, found = pd.factorize(np.asarray(flat[rest], dtype=object), use_na_sentinel=False)
        codes[rest] = sub + 1
        uniq += list(found)
    return codes, uniq


def to_dataset(
    batch: ProfileBatch,
    *,
    added: Mapping[str, AddedColumn] | None = None,
    history: str | None = None,
) -> xr.Dataset:
    """Return the batch as a CF-1.13 contiguous ragged profile dataset.

    Parameters
    ----------
    batch : ProfileBatch
        The batch.
    added : mapping of str to AddedColumn, optional
        Per-level variables to add (e.g. automatic flags), listed in their parent's
        ``ancillary_variables``.
    history : str, optional
        History line or command (see :func:`history_line`), appended to the input's history.

    Returns
    -------
    xarray.Dataset
        Dimensions ``profile`` and ``obs``; encodings set for :meth:`xarray.Dataset.to_netcdf`.
        Flag variables hold raw codes with ``-128`` where a level carries no flag.
    """
    specs, attrs = _output_variables(batch, added, history)
    return _dataset(specs, attrs)


def _dataset(specs: Mapping[str, _Spec], attrs: dict[str, Any]) -> xr.Dataset:
    import xarray as xr

    return xr.Dataset({name: xr.Variable(dims, data, dict(a), encoding=dict(enc))
                       for name, (dims, data, a, enc) in specs.items()}, attrs=attrs)


def write_netcdf(
    batch: ProfileBatch,
    path: str | os.PathLike[str],
    *,
    added: Mapping[str, AddedColumn] | None = None,
    overwrite: bool = False,
    history: str | None = None,
) -> Path:
    """Write a batch as CF-1.13 contiguous ragged NetCDF-4, atomically.

    Parameters
    ----------
    batch : ProfileBatch
        The batch.
    path : path-like
        Output file (``.nc``).
    added : mapping of str to AddedColumn, optional
        Per-level variables to add (see :func:`to_dataset`).
    overwrite : bool, default=False
        Replace an existing file.
    history : str, optional
        History line or command (see :func:`history_line`).

    Returns
    -------
    Path
        The file written.

    Raises
    ------
    OutputExistsError
        If `path` exists and `overwrite` is false.
    """
    specs, attrs = _output_variables(batch, added, history)
    plan = _direct_plan(specs)
    with atomic_output(path, overwrite=overwrite) as tmp:
        if plan is None:
            _dataset(specs, attrs).to_netcdf(tmp, engine="netcdf4", format="NETCDF4")
        else:
            _write_direct(tmp, plan, attrs)
    return Path(path)


# The direct writer encodes the variables qcflag writes as ``xarray.Dataset.to_netcdf(
# engine="netcdf4", format="NETCDF4")`` would (xarray 2024-2026: global attributes in order;
# dimensions in order of first use; per variable createVariable with xarray's default
# arguments and setncatts), without xarray's per-variable encoding, locking and file-manager
# round trips (~3 ms per variable). Unlike xarray it defines every variable before writing
# any data: a write right after its createVariable makes HDF5 flush the metadata written so
# far, and batching the writes saves ~6 ms per file. The file therefore differs from
# xarray's in layout (not byte-identical), but decodes to the same dataset, raw and decoded
# (tests/test_io_netcdf.py compares the two on every kind of column), and the same batch
# always gives the same bytes. Anything else (another dtype, an encoding it does not know,
# a variable named like a dimension) goes through xarray.
_CreateArgs = tuple[str, Any, tuple[str, ...], Any, dict[str, Any], Any]
_KNOWN_ENCODING = frozenset({"_FillValue"})


def _direct_variable(name: str, spec: _Spec) -> _CreateArgs | None:
    """Encode one variable as xarray's CF and netCDF4 encoders would; None if unsure."""
    dims, data, attrs, encoding = spec
    if not isinstance(data, np.ndarray) or data.ndim != len(dims) or data.size == 0:
        return None
    if set(encoding) - _KNOWN_ENCODING or "_FillValue" in attrs:
        return None
    kind = data.dtype.kind
    fill = None
    if kind == "f" and "_FillValue" not in encoding:
        return None  # xarray gives floats a default _FillValue: leave that to it
    if "_FillValue" in encoding:
        if kind not in "fiu":
            return None
        fv = encoding["_FillValue"]
        fill = np.asarray(fv).astype(data.dtype)[()]
        if kind == "f":
            if not np.isnan(fill):  # xarray would replace NaN with the fill: leave it that
                return None
        elif fill != fv:
            return None
    if kind == "O":
        if data.ndim != 1 or not all(type(x) is str for x in data.tolist()):
            return None
        return name, str, dims, data, dict(attrs), None
    if kind == "S":
        width = data.dtype.itemsize
        chars = data.reshape((*data.shape, 1)).view("S1")  # xarray's bytes_to_char
        return name, chars.dtype, (*dims, f"string{width}"), chars, dict(attrs), None
    if kind in "fiu" and data.dtype.byteorder in "=|" and data.dtype.itemsize <= 8:
        return name, data.dtype, dims, data, dict(attrs), fill
    return None


def _time_variable(name: str, spec: _Spec) -> _CreateArgs | None:
    """Encode a datetime64 variable with CF units as xarray does (exact integer times)."""
    dims, data, attrs, encoding = spec
    if set(encoding) != {"units", "calendar", "dtype", "_FillValue"} or "units" in attrs:
        return None
    m = re.fullmatch(r"(seconds|milliseconds|microseconds|nanoseconds) since "
                     r"1970-01-01 00:00:00", str(encoding["units"]))
    if (m is None or encoding["calendar"] != "standard" or np.dtype(encoding["dtype"])
            != np.int64 or not isinstance(data, np.ndarray) or data.ndim != 1
            or data.size == 0 or data.dtype != np.dtype("datetime64[ns]")):
        return None
    fill = np.asarray(encoding["_FillValue"]).astype(np.int64)[()]
    step = {"seconds": 10**9, "milliseconds": 10**6, "microseconds": 10**3,
            "nanoseconds": 1}[m.group(1)]
    ns = data.view(np.int64)
    nat = np.isnat(data)
    if (ns[~nat] % step).any():
        return None
    values = np.where(nat, fill, ns // step)
    out = {**attrs, "units": f"{m.group(1)} since 1970-01-01", "calendar": "standard"}
    return name, np.dtype(np.int64), dims, values, out, fill


def _direct_plan(specs: Mapping[str, _Spec]) -> tuple[dict[str, int], list[_CreateArgs]] | None:
    """Dimensions and createVariable arguments for the direct writer, or None."""
    plan: list[_CreateArgs] = []
    dims: dict[str, int] = {}
    for name, spec in specs.items():
        data = spec[1]
        kind = getattr(getattr(data, "dtype", None), "kind", "")
        args = _time_variable(name, spec) if kind == "M" else _direct_variable(name, spec)
        if args is None:
            return None
        for d, n in zip(args[2], args[3].shape, strict=True):
            if dims.setdefault(d, n) != n:
                return None
        plan.append(args)
    if set(dims) & set(specs) or any("/" in n for n in [*dims, *specs]):
        return None  # dimension coordinates and odd names: leave them to xarray
    return dims, plan


def _write_direct(path: Path, plan: tuple[dict[str, int], list[_CreateArgs]],
                  attrs: Mapping[str, Any]) -> None:
    """Write `plan` (from :func:`_direct_plan`) and global `attrs` to `path` with netCDF4."""
    import netCDF4

    dims, variables = plan
    ds = netCDF4.Dataset(os.fspath(path), mode="w", clobber=True, diskless=False,
                         persist=False, format="NETCDF4")
    try:
        for k, v in attrs.items():
            if np.asarray(v).dtype.kind in "US" and np.asarray(v).size > 1:
                ds.setncattr_string(k, v)
            else:
                ds.setncattr(k, v)
        for d, n in dims.items():
            ds.createDimension(d, size=n)
        created = []
        for name, datatype, vdims, data, vattrs, fill in variables:
            var = ds.createVariable(
                varname=name, datatype=datatype, dimensions=vdims, zlib=False,
                complevel=4, shuffle=True, fletcher32=False, contiguous=False,
                chunksizes=None, endian="native", least_significant_digit=None,
                fill_value=fill)
            var.setncatts(vattrs)
            var.set_auto_maskandscale(False)
            var.set_auto_chartostring(False)
            created.append((var, data))
        for var, data in created:  # all metadata first: one flush instead of one per variable
            _write_whole(var, data)
    finally:
        ds.close()


def _write_whole(var: Any, data: NDArray[Any]) -> None:
    """``var[...] = data`` for a new netCDF4 variable of `data`'s shape (mask/scale off).

    ``Variable.__setitem__`` spends ~100 us of Python per call on slice arithmetic; with
    auto mask/scale off, no ``least_significant_digit`` and a numpy array of the
    variable's shape it hands the array itself to ``Variable._put(data, start, count,
    stride)`` (which casts to the variable's dtype), as done here directly. The file bytes
    are the same (tests/test_io_netcdf.py compares with ``var[...] = data``).
    """
    if (data.ndim == 0 or data.size == 0 or tuple(var.shape) != data.shape
            or (var.dtype is str) != (data.dtype.kind == "O")):
        var[...] = data
        return
    var._put(data, *_whole(data.shape))
