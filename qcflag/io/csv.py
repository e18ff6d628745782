"""Canonical CSV: one row per level.

Columns, in the order the writer puts them::

    profile_id, cruise, [platform,] time, latitude, longitude, pressure, temperature,
    salinity, [pressure_flag, temperature_flag, salinity_flag,] [per-profile columns,]
    [other per-level columns, in their original order,] [added columns]

``time`` is ISO 8601 UTC ending in ``Z``; pressure in dbar, temperature in degrees Celsius
(ITS-90), salinity PSS-78; flags are the one-character codes of the batch's flag scheme
(empty where a level carries no flag). Floats are written with the shortest text that reads
back to the same double, so CSV -> NetCDF -> CSV is byte-identical.

Reading
-------
* Column aliases (:data:`qcflag.io.common.ALIASES`) are matched case-insensitively; an
  explicit ``columns={canonical: actual}`` mapping wins. A ``depth`` column (m) is converted
  to pressure with TEOS-10 ``gsw.p_from_z`` when there is no pressure column.
* Empty cells, ``NaN`` and the fill values -999, -9999, 99999 in value and position columns
  read as missing (NaN).
* Rows of a profile (same ``cruise`` and ``profile_id``) need not be contiguous; they are
  grouped by first appearance, keeping their order within each profile.
* A last line with fewer fields than the header (a file cut mid-line) is dropped with a
  :class:`TruncatedInputWarning`; ``batch.attrs["dropped_rows"]`` records how many. A last
  line with every field is kept even without a final newline (nothing shows it was cut).
* Time, latitude, longitude, platform of a profile are taken from its first row.
"""

from __future__ import annotations

import csv as _csv
import os
import warnings
from collections.abc import Mapping
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd

from qcflag.exceptions import InputFileError, QCFlagError
from qcflag.io.atomic import atomic_output
from qcflag.io.common import (
    ALIASES,
    CSV_FILL_VALUES,
    FLAG_SUFFIXES,
    PROFILE_COLUMNS,
    AddedColumn,
    depth_to_pressure,
    format_times,
    normalise_units,
    to_ns,
)
from qcflag.profiles import LEVEL_VARIABLES, META_COLUMNS, ProfileBatch
from qcflag.schemes import format_codes, get_scheme, parse_codes

if TYPE_CHECKING:
    from numpy.typing import NDArray

__all__ = ["TruncatedInputWarning", "read_csv", "write_csv"]

_NA_STRINGS = ["", "nan", "NaN", "NAN", "NA", "N/A", "n/a", "null", "NULL", "-nan", "None"]
_NUMERIC = ("pressure", "depth", "temperature", "salinity", "latitude", "longitude")
_REQUIRED = ("profile_id", "time", "latitude", "longitude", "pressure", "temperature",
             "salinity")
FLAG_COLUMNS = tuple(f"{v}_flag" for v in LEVEL_VARIABLES)


class TruncatedInputWarning(UserWarning):
    """An input file ended mid-record; the incomplete record was dropped."""


def _fail(path: Path, problem: str, fix: str | None = None) -> InputFileError:
    return InputFileError(path, problem, fix)


def _resolve_columns(
    path: Path, header: list[str], columns: Mapping[str, str] | None
) -> dict[str, str]:
    """Map canonical names (and ``<var>_flag``) to actual header names."""
    lower: dict[str, str] = {}
    for h in header:
        lower.setdefault(h.strip().lower(), h)
    known = set(ALIASES) | set(FLAG_COLUMNS)
    found: dict[str, str] = {}
    used: set[str] = set()
    for canon, actual in (columns or {}).items():
        if canon not in known:
            raise _fail(path, f"--columns names unknown canonical column {canon!r}",
                        f"use one of {', '.join(sorted(known))}")
        if actual not in header:
            hit = lower.get(str(actual).strip().lower())
            if hit is None:
                raise _fail(path, f"column {actual!r} given for {canon} is not in the file",
                            f"the file has {', '.join(header[:20])}")
            actual = hit
        found[canon] = actual
        used.add(actual)
    for canon, aliases in ALIASES.items():
        if canon in found:
            continue
        for a in aliases:
            hit = lower.get(a)
            if hit is not None and hit not in used:
                found[canon] = hit
                used.add(hit)
                break
    if "pressure" in found and "depth" not in (columns or {}):
        found.pop("depth", None)
    for var in LEVEL_VARIABLES:
        key = f"{var}_flag"
        if key in found:
            continue
        bases = [var, *ALIASES[var]]
        if var in found:
            bases.insert(0, found[var].strip().lower())
        for b in bases:
            hit = next((lower[b + s] for s in FLAG_SUFFIXES if b + s in lower
                        and lower[b + s] not in used), None)
            if hit is not None:
                found[key] = hit
                used.add(hit)
                break
    return found


def _incomplete_tail(path: Path, n_fields: int) -> bool:
    """Tell whether the last line is cut short (no final newline and too few fields)."""
    size = path.stat().st_size
    with path.open("rb") as fh:
        fh.seek(max(0, size - 65536))
        tail = fh.read()
    if not tail or tail.endswith((b"\n", b"\r")):
        return False
    last = tail.rsplit(b"\n", 1)[-1].decode("utf-8", errors="replace")
    try:
        fields = next(_csv.reader([last]))
    except (StopIteration, _csv.Error):
        return True
    return len(fields) < n_fields


def _numeric(path: Path, name: str, col: pd.Series) -> np.ndarray:
    """Float64 values of a column, refusing non-numeric text with its line number."""
    if col.dtype.kind in "fiub":
        arr = col.to_numpy(dtype=np.float64, na_value=np.nan)
    else:
        coerced = pd.to_numeric(col, errors="coerce")
        text = col.astype(str).str.strip()
        bad = (coerced.isna().to_numpy() & ~text.isin(_NA_STRINGS).to_numpy()
               & col.notna().to_numpy())
        if bad.any():
            i = int(np.flatnonzero(bad)[0])
            raise _fail(path, f"column {name!r} line {i + 2} has a non-numeric value "
                        f"{col.iloc[i]!r}", "fix the value or map another column with --columns")
        arr = coerced.to_numpy(dtype=np.float64, na_value=np.nan)
    arr = np.array(arr, dtype=np.float64)
    arr[np.isin(arr, CSV_FILL_VALUES)] = np.nan
    return arr


def _parse_times(path: Path, name: str, col: pd.Series) -> np.ndarray:
    codes, uniques = pd.factorize(col.fillna("").astype(str).str.strip())
    uniques = np.asarray(uniques, dtype=object)
    parsed = pd.to_datetime(pd.Series(uniques), utc=True, format="ISO8601", errors="coerce")
    bad = parsed.isna().to_numpy() & ~np.isin(uniques, _NA_STRINGS)
    if bad.any():
        first = uniques[np.flatnonzero(bad)[0]]
        line = int(np.flatnonzero(codes == np.flatnonzero(bad)[0])[0]) + 2
        raise _fail(path, f"column {name!r} line {line} has a time {first!r} that is not "
                    "ISO 8601", "write times like 2024-01-14T10:22:00Z")
    years = parsed.dt.year.to_numpy(dtype=np.float64, na_value=np.nan)
    out_of_range = (years < 1678) | (years > 2261)
    if out_of_range.any():
        first = uniques[np.flatnonzero(out_of_range)[0]]
        raise _fail(path, f"column {name!r} has a time {first!r} outside 1678-2261",
                    "check the year")
    ns = to_ns(parsed)
    return ns[codes] if codes.size else ns[:0]


def _parse_flags(path: Path, name: str, col: pd.Series, scheme: str) -> np.ndarray:
    codes, uniques = pd.factorize(col.fillna("").astype(str).str.strip())
    where = f"{path}: column {name!r}"
    try:
        parsed = parse_codes(np.asarray(uniques, dtype=str), scheme, where=where)
    except InputFileError:
        raise
    except QCFlagError as exc:
        valid = " ".join(c.code for c in get_scheme(scheme).codes)
        msg = str(exc)
        if "valid:" not in msg:
            msg = f"{msg} (valid {scheme} codes: {valid}; give the right --scheme)"
        raise QCFlagError(msg) from None
    return parsed[codes] if codes.size else np.zeros(0, np.int8)


def _extra_column(col: pd.Series) -> pd.Series:
    """Numeric when the text reads back identically as a number, else the text itself."""
    s = col.fillna("").astype(str)
    arr = s.to_numpy(dtype=object)
    ok = arr != ""
    if not ok.any():
        return s
    vals = pd.to_numeric(pd.Series(arr[ok]), errors="coerce")
    if vals.isna().any():
        return s
    if vals.dtype.kind in "iu":
        if not (vals.astype(str).to_numpy() == arr[ok]).all():
            return s
        out = pd.array(np.zeros(arr.size, dtype=np.int64), dtype="Int64")
        out[ok] = vals.to_numpy()
        out[~ok] = pd.NA
        return pd.Series(out, name=col.name)
    f = vals.to_numpy(dtype=np.float64)
    if not (f.astype(str) == arr[ok].astype(str)).all():
        return s
    full = np.full(arr.size, np.nan)
    full[ok] = f
    return pd.Series(full, name=col.name)


def read_csv(
    path: str | os.PathLike[str],
    *,
    scheme: str = "argo",
    columns: Mapping[str, str] | None = None,
) -> ProfileBatch:
    """Read a canonical CSV file (one row per level) into a batch.

    Parameters
    ----------
    path : path-like
        The CSV file.
    scheme : str, default="argo"
        Flag scale of the manual flag columns.
    columns : mapping of str to str, optional
        Explicit ``{canonical: actual}`` column names (e.g. ``{"temperature": "T68"}``).

    Returns
    -------
    ProfileBatch

    Raises
    ------
    InputFileError
        Missing required columns, non-numeric values, bad times, empty file.
    QCFlagError
        Unknown flag codes (the message lists the valid ones).
    UnitsError
        Values that plainly are not in the canonical units.
    """
    path = Path(path)
    scheme = get_scheme(scheme).name
    if path.is_dir():
        raise IsADirectoryError(21, "is a directory", str(path))
    if path.stat().st_size == 0:
        raise _fail(path, "empty file", "give a CSV with a header line and one row per level")
    try:
        header = list(pd.read_csv(path, nrows=0, engine="c").columns.astype(str))
    except pd.errors.EmptyDataError:
        raise _fail(path, "empty file (no header line)",
                    "give a CSV with a header line and one row per level") from None
    except (pd.errors.ParserError, UnicodeDecodeError, ValueError) as exc:
        raise _fail(path, f"not a readable CSV ({_first_line(exc)})",
                    "check that it is a comma-separated text file") from None
    found = _resolve_columns(path, header, columns)
    need = [c for c in _REQUIRED if c not in found and not (c == "pressure" and "depth" in found)]
    if need:
        raise _fail(path, f"missing required column(s) {', '.join(need)}",
                    "name them with --columns canonical=actual, e.g. --columns "
                    f"{need[0]}=MY_{need[0].upper()}")
    numeric = {found[c] for c in _NUMERIC if c in found}
    dtypes = {h: str for h in header if h not in numeric}
    na_values = dict.fromkeys(numeric, _NA_STRINGS)
    try:
        table = pd.read_csv(
            path, engine="c", dtype=dtypes,
            keep_default_na=False, na_values=na_values, encoding="utf-8",
        )
    except pd.errors.EmptyDataError:
        raise _fail(path, "empty file", "give a CSV with one row per level") from None
    except (pd.errors.ParserError, UnicodeDecodeError, ValueError, OverflowError) as exc:
        raise _fail(path, f"not a readable CSV ({_first_line(exc)})",
                    "check the file is complete, comma-separated UTF-8 text") from None
    attrs: dict[str, Any] = {"sources": [str(path)], "notes": []}
    if len(table) and _incomplete_tail(path, len(header)):
        table = table.iloc[:-1]
        attrs["dropped_rows"] = 1
        warnings.warn(f"{path}: the last line is cut short; dropped 1 incomplete row",
                      TruncatedInputWarning, stacklevel=2)
    if len(table) == 0:
        raise _fail(path, "no data rows (header only)", "give one row per level")
    return _build(path, table, found, header, scheme, attrs)


def _first_line(exc: BaseException) -> str:
    text = str(exc).strip().splitlines()
    return text[0] if text else type(exc).__name__


def _build(
    path: Path,
    table: pd.DataFrame,
    found: dict[str, str],
    header: list[str],
    scheme: str,
    attrs: dict[str, Any],
) -> ProfileBatch:
    n = len(table)
    text = {c: table[found[c]].fillna("").astype(str).to_numpy(dtype=object)
            for c in ("profile_id", "cruise", "platform") if c in found}
    if "cruise" not in text:
        text["cruise"] = np.full(n, path.stem, dtype=object)
        attrs["notes"].append(f"no cruise column; cruise set to the file name {path.stem!r}")
    key = pd.Series(text["cruise"]).str.cat(pd.Series(text["profile_id"]), sep="\x1f")
    codes, _ = pd.factorize(key)
    order: np.ndarray | None = None
    if n > 1 and (np.diff(codes) < 0).any():
        order = np.argsort(codes, kind="stable")
        codes = codes[order]
        attrs["notes"].append("rows of interleaved profiles were grouped by profile")
    counts = np.bincount(codes)
    offsets = np.concatenate([[0], np.cumsum(counts)]).astype(np.int64)
    heads = offsets[:-1]

    def col(name: str) -> pd.Series:
        s = table[name].reset_index(drop=True)
        return s.iloc[order].reset_index(drop=True) if order is not None else s

    values = {c: _numeric(path, found[c], col(found[c])) for c in _NUMERIC if c in found}
    times = _parse_times(path, found["time"], col(found["time"]))
    lat, lon = values["latitude"], values["longitude"]
    if "pressure" not in values:
        values["pressure"] = depth_to_pressure(values["depth"], lat)
        attrs["notes"].append(f"pressure computed from depth column {found['depth']!r} "
                              "with TEOS-10 gsw.p_from_z")
    names = {v: found.get(v, found.get("depth", v)) for v in LEVEL_VARIABLES}
    conv = normalise_units({v: values[v] for v in LEVEL_VARIABLES}, {}, source=str(path),
                           names=names, notes=attrs["notes"])

    def reordered(a: np.ndarray) -> np.ndarray:
        return a[order] if order is not None else a

    profiles = pd.DataFrame({
        "profile_id": reordered(text["profile_id"])[heads],
        "cruise": reordered(text["cruise"])[heads],
        "time": times[heads],
        "latitude": lat[heads],
        "longitude": lon[heads],
        "platform": (reordered(text["platform"])[heads] if "platform" in text
                     else np.full(heads.size, "", dtype=object)),
    })
    flags = {v: _parse_flags(path, found[f"{v}_flag"], col(found[f"{v}_flag"]), scheme)
             for v in LEVEL_VARIABLES if f"{v}_flag" in found}
    used = set(found.values())
    pidx = np.repeat(np.arange(heads.size), counts)
    extra: dict[str, pd.Series] = {}
    for h in header:
        if h in used:
            continue
        s = col(h)
        if h.strip().lower() in PROFILE_COLUMNS and h not in profiles.columns:
            arr = s.fillna("").astype(str).to_numpy(dtype=object)
            if (arr == arr[heads][pidx]).all():
                profiles[h] = arr[heads]
                continue
        extra[h] = _extra_column(s)
    attrs["column_map"] = dict(found)
    if not attrs["notes"]:
        attrs.pop("notes")
    try:
        return ProfileBatch(
            offsets=offsets,
            pressure=conv["pressure"],
            temperature=conv["temperature"],
            salinity=conv["salinity"],
            profiles=profiles,
            flags=flags,
            scheme=scheme,
            extra=pd.DataFrame(extra) if extra else None,
            attrs=attrs,
        )
    except QCFlagError as exc:
        raise _fail(path, str(exc)) from None


def _format_added(name: str, col: AddedColumn, n: int) -> Any:
    vals = np.asarray(col.values)
    if vals.shape != (n,):
        raise QCFlagError(f"added column {name!r}: {vals.shape} values for {n} levels")
    if "flag_values" in col.attrs and vals.dtype.kind in "iu":
        return format_codes(vals)
    return vals


def level_table(
    batch: ProfileBatch, *, added: Mapping[str, AddedColumn] | None = None
) -> pd.DataFrame:
    """Build the canonical CSV table of a batch (columns in writing order, flags as text).

    Parameters
    ----------
    batch : ProfileBatch
        The batch.
    added : mapping of str to AddedColumn, optional
        Columns to append after the batch's own.

    Returns
    -------
    pandas.DataFrame
        One row per level.
    """
    pi = batch.profile_index

    def per_level(values: Any) -> pd.Categorical:
        # profile text repeated on each of its levels: coded, not copied level by level
        codes, uniq = pd.factorize(np.asarray(values, dtype=object), use_na_sentinel=True)
        return pd.Categorical.from_codes(codes[pi], categories=uniq)

    prof = batch.profiles
    data: dict[str, Any] = {
        "profile_id": per_level(prof["profile_id"].astype(str)),
        "cruise": per_level(prof["cruise"].astype(str)),
    }
    platform = prof["platform"].fillna("").astype(str).to_numpy()
    if (platform != "").any():
        data["platform"] = per_level(platform)
    data["time"] = per_level(format_times(to_ns(prof["time"])))
    data["latitude"] = prof["latitude"].to_numpy(dtype=np.float64)[pi]
    data["longitude"] = prof["longitude"].to_numpy(dtype=np.float64)[pi]
    for v in LEVEL_VARIABLES:
        data[v] = batch.values(v)
    for v in LEVEL_VARIABLES:
        if v in batch.flags:
            data[f"{v}_flag"] = format_codes(batch.flags[v])
    for c in prof.columns:
        if c not in META_COLUMNS:
            data[c] = prof[c].to_numpy()[pi]
    if batch.extra is not None:
        for c in batch.extra.columns:
            if c in data:
                raise QCFlagError(f"extra column {c!r} clashes with a canonical column")
            data[c] = batch.extra[c].reset_index(drop=True)
    for name, col in (added or {}).items():
        if name in data:
            raise QCFlagError(f"added column {name!r} clashes with an existing column")
        data[name] = _format_added(name, col, batch.n_levels)
    return pd.DataFrame(data)


def write_csv(
    batch: ProfileBatch,
    path: str | os.PathLike[str],
    *,
    added: Mapping[str, AddedColumn] | None = None,
    overwrite: bool = False,
    history: str | None = None,
) -> Path:
    """Write a batch as canonical CSV, atomically.

    Parameters
    ----------
    batch : ProfileBatch
        The batch to write.
    path : path-like
        Output file.
    added : mapping of str to AddedColumn, optional
        Extra per-level columns (e.g. automatic flags) appended after the batch's own.
    overwrite : bool, default=False
        Replace an existing file.
    history : str, optional
        Ignored: a canonical CSV carries no metadata lines (kept for a uniform signature).

    Returns
    -------
    Path
        The file written.

    Raises
    ------
    OutputExistsError
        If `path` exists and `overwrite` is false.
    """
    del history
    table = level_table(batch, added=added)
    with atomic_output(path, overwrite=overwrite) as tmp:
        write_table(table, tmp)
    return Path(path)


_ROWS_PER_BLOCK = 65_536
"""Rows formatted and written at a time by :func:`write_table` (bounded memory)."""


def write_table(table: pd.DataFrame, path: str | os.PathLike[str]) -> None:
    """Write `table` as CSV, byte for byte as pandas' ``to_csv`` does, several times faster.

    The pandas call it stands for is ``table.to_csv(path, index=False, lineterminator=LF,
    na_rep="", encoding="utf-8")``. Each column is turned into text on its own: numbers
    with ``repr`` (the shortest text that reads back to the same double, as pandas writes
    them), text through the csv module once per distinct value (so quoting follows the same
    rules). Rows are then joined a block of :data:`_ROWS_PER_BLOCK` at a time. Column
    types it does not know (datetimes, float32, objects that are not all text...) and
    one-column tables go to pandas.
    """
    if table.shape[1] < 2 or len(table) == 0:
        table.to_csv(path, index=False, lineterminator="\n", na_rep="", encoding="utf-8")
        return
    quote = _field_quoter()
    header = [quote(str(c)) for c in table.columns]
    # categories' text is formatted once per column, not once per block
    categories = {c: _category_text(table[c].dtype, quote) for c in table.columns
                  if isinstance(table[c].dtype, pd.CategoricalDtype)}
    with open(path, "w", encoding="utf-8", newline="") as fh:
        fh.write(",".join(header) + "\n")
        for start in range(0, len(table), _ROWS_PER_BLOCK):
            block = table.iloc[start:start + _ROWS_PER_BLOCK]
            cols = [_column_text(block[c], quote) if c not in categories
                    else _coded_text(categories[c], block[c]) for c in block.columns]
            if any(c is None for c in cols):
                fh.close()
                table.to_csv(path, index=False, lineterminator="\n", na_rep="",
                             encoding="utf-8")
                return
            fh.write("\n".join(map(",".join, zip(*cols, strict=True))))
            fh.write("\n")


def _field_quoter() -> Any:
    """Return ``f(text) -> field`` quoting one field as pandas' csv writer does."""
    import io

    buf = io.StringIO()
    writer = _csv.writer(buf, lineterminator="\n", delimiter=",", quotechar='"',
                         quoting=_csv.QUOTE_MINIMAL, doublequote=True)

    def quote(text: str) -> str:
        buf.seek(0)
        buf.truncate()
        writer.writerow((text, ""))  # a second, empty field: no single-field special case
        return buf.getvalue()[:-2]  # drop "," and the line end

    return quote


def _float_text(vals: NDArray[np.float64]) -> list[str]:
    """``repr`` of each value (pandas' text for a double), ``""`` for NaN."""
    text = list(map(repr, vals.tolist()))
    for i in np.flatnonzero(np.isnan(vals)).tolist():  # few
        text[i] = ""
    return text


def _by_value(vals: NDArray[Any], fmt: Any) -> list[str]:
    """Return ``fmt(vals)``, formatting each distinct value once when values repeat.

    Per-profile columns broadcast to their levels, grades and confidences repeat a few
    values; measured values are mostly distinct and are formatted directly.
    """
    codes, uniq = pd.factorize(vals)
    if len(uniq) * 4 > len(vals):  # mostly distinct: format directly
        return fmt(vals)
    return np.array(fmt(np.asarray(uniq)), dtype=object)[codes].tolist()


def _category_text(dtype: pd.CategoricalDtype, quote: Any) -> NDArray[np.object_] | None:
    """Text of each category and, last, ``""`` for missing (code -1); None if unsure."""
    cats = _column_text(pd.Series(dtype.categories), quote)
    return None if cats is None else np.array([*cats, ""], dtype=object)


def _coded_text(table: NDArray[np.object_] | None, col: pd.Series) -> list[str] | None:
    """Text of a categorical column from :func:`_category_text` of its categories."""
    return None if table is None else table[col.cat.codes.to_numpy()].tolist()


def _column_text(col: pd.Series, quote: Any) -> list[str] | None:
    """Text of every cell of `col` as pandas' ``to_csv`` writes it, or None if unsure.

    Categorical columns go through :func:`_category_text` and :func:`_coded_text`.
    """
    dt = col.dtype
    if isinstance(dt, pd.api.extensions.ExtensionDtype) and dt.kind in "iu":  # nullable int
        na = col.isna().to_numpy()
        vals = col.to_numpy(dtype=np.int64, na_value=0)
        out = np.array(list(map(str, vals.tolist())), dtype=object)
        out[na] = ""
        return out.tolist()
    if isinstance(dt, np.dtype):
        vals = col.to_numpy()
        if dt == np.float64:
            # by bit pattern, so -0.0 and 0.0 stay apart; NaN (any payload) is written empty
            return _by_value(vals.view(np.int64), lambda u: _float_text(u.view(np.float64)))
        if dt.kind in "iub":
            return _by_value(vals, lambda u: list(map(str, u.tolist())))
        if dt.kind != "O":
            return None
    elif not isinstance(dt, pd.StringDtype):
        return None
    codes, uniq = pd.factorize(col, use_na_sentinel=True)
    if not all(type(u) is str for u in uniq):
        return None
    table = np.array([*(quote(u) for u in uniq), ""], dtype=object)  # -1 (missing): ""
    return table[codes].tolist()
