"""qcflag as one step of a processing chain: xarray datasets in, datasets out.

:func:`flag_dataset` and :func:`check_dataset` take any CF discrete-sampling-geometry
profile dataset (contiguous ragged, indexed ragged, incomplete or orthogonal
multidimensional, a single profile) or an Argo-format profile dataset, and return a **new**
dataset: every original variable and attribute as it was, plus the flag (or check)
variables **in the dataset's own layout**, i.e. on the same dimensions as the data
variables they describe. Padding cells of multidimensional layouts (no level there) get the
fill value. The parent variables' ``ancillary_variables`` list the new flag variables and a
line is appended to the global ``history``; the input dataset is never modified.

How the levels are mapped back: before reading, a temporary per-level variable holding
each cell's flat position is attached to (a shallow copy of) the dataset; the reader
(:func:`qcflag.io.from_dataset`) carries it through as an extra level column, so whatever
levels the reader keeps, reorders (indexed ragged) or drops (padding), each flag lands on
the cell it belongs to. Argo files, whose reader keeps no extra columns, are mapped by the
Argo rule itself (a level exists where the profile's pressure in use is finite).

Dask-backed datasets are flagged lazily, block by block of whole profiles: for contiguous
ragged arrays the blocks follow the existing chunks of the sample dimension, moved to the
nearest profile boundary (``row_size`` is read to find them; it is one integer per
profile); multidimensional layouts are split along the profile dimension's chunks. Each
block is read, flagged and turned into flag arrays inside one dask task, so nothing is
computed until ``.compute()`` (or a write) and only one block per worker is in memory.
Indexed ragged arrays interleave profiles, so they are flagged as one block. The names and
attributes of the new variables are found without touching the data, by flagging a tiny
invented profile with the same rules and model.

Blocks never split a cruise (when the dataset has a per-profile cruise variable):
:func:`qcflag.pipeline.flag_batch` treats every cruise on its own (a fix is compared with the
rest of its platform's track, a cast with the cruise's other casts), so the blocks give
exactly the flags a whole-dataset run gives.
"""

from __future__ import annotations

import dataclasses
import itertools
import math
import operator
from collections.abc import Callable, Hashable, Mapping
from typing import TYPE_CHECKING, Any, Literal

import numpy as np
import pandas as pd

from qcflag.exceptions import InputFileError

if TYPE_CHECKING:
    import xarray as xr

    from qcflag.io.common import AddedColumn
    from qcflag.profiles import ProfileBatch

__all__ = ["POSITION_VARIABLE", "check_dataset", "flag_dataset"]

POSITION_VARIABLE = "__qcflag_level_position__"
"""Name of the temporary level-position variable (never present in outputs)."""

FLAG_FILL = np.int8(-128)
"""Fill value of byte flag variables (as the NetCDF writer uses)."""

_STANDARD = {
    "pressure": ("sea_water_pressure", "sea_water_pressure_due_to_sea_water"),
    "temperature": ("sea_water_temperature",),
    "salinity": ("sea_water_practical_salinity", "sea_water_salinity"),
    "depth": ("depth",),
}
_NAMES = {
    "pressure": ("pressure", "pres", "ctdprs", "prs"),
    "temperature": ("temperature", "temp", "ctdtmp", "t90"),
    "salinity": ("salinity", "psal", "ctdsal", "sal"),
    "depth": ("depth", "z"),
}
_ARGO_NAMES = {"pressure": "PRES", "temperature": "TEMP", "salinity": "PSAL"}

Kind = Literal["flag", "check"]


# --------------------------------------------------------------------------- layout
def _is_argo(ds: xr.Dataset) -> bool:
    conv = str(ds.attrs.get("Conventions", ""))
    return "N_PROF" in ds.dims and ("DATA_MODE" in ds.variables
                                    or "PLATFORM_NUMBER" in ds.variables
                                    or conv.startswith("Argo"))


def _find(ds: xr.Dataset, key: str) -> str | None:
    """Name of the variable holding `key` (by standard_name, then by common names)."""
    if _is_argo(ds) and key in _ARGO_NAMES:
        return _ARGO_NAMES[key] if _ARGO_NAMES[key] in ds.variables else None
    for name, var in ds.variables.items():
        sn = str(var.attrs.get("standard_name", "")).split(" ")[0]
        if sn in _STANDARD[key]:
            return str(name)
    lower = {str(n).lower(): str(n) for n in ds.variables}
    for alias in _NAMES[key]:
        if alias in lower:
            return lower[alias]
    return None


@dataclasses.dataclass(frozen=True)
class _Layout:
    kind: str  # "contiguous", "indexed", "multidimensional", "argo"
    level_dims: tuple[str, ...]
    instance_dim: str | None = None
    count: str | None = None
    parents: dict[str, str] = dataclasses.field(default_factory=dict)


def _layout(ds: xr.Dataset) -> _Layout:
    temp = _find(ds, "temperature")
    if temp is None:
        raise InputFileError("<dataset>", "no temperature variable (standard_name "
                             "sea_water_temperature)", "add standard_name attributes")
    parents = {k: v for k in ("pressure", "temperature", "salinity")
               if (v := _find(ds, k)) is not None}
    if "pressure" not in parents and (d := _find(ds, "depth")) is not None:
        parents["pressure"] = d
    dims = tuple(str(d) for d in ds[temp].dims)
    if _is_argo(ds):
        return _Layout("argo", dims, "N_PROF", parents=parents)
    count = next((str(n) for n, v in ds.variables.items() if "sample_dimension" in v.attrs),
                 None)
    if count is not None:
        return _Layout("contiguous", dims, str(ds[count].dims[0]), count, parents)
    if any("instance_dimension" in v.attrs for v in ds.variables.values()):
        return _Layout("indexed", dims, None, parents=parents)
    inst = dims[0] if len(dims) == 2 else None
    return _Layout("multidimensional", dims, inst, parents=parents)


def _argo_positions(ds: xr.Dataset, batch: ProfileBatch) -> np.ndarray:
    """Flat (N_PROF, N_LEVELS) positions of the levels the Argo reader kept."""
    from qcflag.io.argo import _chars, _values

    n_prof, n_lev = int(ds.sizes["N_PROF"]), int(ds.sizes["N_LEVELS"])
    shape = (n_prof, n_lev)
    mode = _chars(ds, "DATA_MODE", n_prof)
    adjusted = np.isin(mode, ["A", "D"])[:, None]
    pres = np.where(adjusted, _values(ds, "PRES_ADJUSTED", shape, "<dataset>"),
                    _values(ds, "PRES", shape, "<dataset>"))
    pos = np.flatnonzero(np.isfinite(pres))
    if pos.size != batch.n_levels:  # pragma: no cover - the Argo reader changed its rule
        raise InputFileError("<dataset>", "cannot map the Argo levels back to N_LEVELS",
                             "flag the file with `qcflag flag` instead")
    return pos


# --------------------------------------------------------------------------- one block
def _read_block(ds: xr.Dataset, layout: _Layout, scheme: str | None,
                source: str | None) -> tuple[ProfileBatch, np.ndarray, tuple[int, ...]]:
    """Read a (numpy-backed) dataset; return the batch and each level's flat cell position."""
    from qcflag.io import from_dataset

    shape = tuple(int(ds.sizes[d]) for d in layout.level_dims)
    if layout.kind == "argo":
        batch = from_dataset(ds, scheme=scheme, source=source)
        return batch, _argo_positions(ds, batch), shape
    marker = np.arange(math.prod(shape), dtype=np.int64).reshape(shape)
    tagged = ds.assign({POSITION_VARIABLE: (layout.level_dims, marker)})
    batch = from_dataset(tagged, scheme=scheme, source=source)
    if batch.extra is None or POSITION_VARIABLE not in batch.extra.columns:
        raise InputFileError(source or "<dataset>", "cannot map the levels back to the "
                             f"dimensions {layout.level_dims}", "write the dataset to a file "
                             "and use `qcflag flag`")
    pos = batch.extra[POSITION_VARIABLE].to_numpy(dtype=np.int64)
    rest = batch.extra.drop(columns=[POSITION_VARIABLE])
    batch = dataclasses.replace(batch, extra=rest if len(rest.columns) else None)
    return batch, pos, shape


def _flag_columns(batch: ProfileBatch, model: Any, rules: Any, scheme: str,
                  probabilities: bool, options: Mapping[str, Any]) -> dict[str, AddedColumn]:
    from qcflag.pipeline import flag_batch, flagged_columns

    result = flag_batch(batch, model=model, rules=rules, scheme=scheme, **options)
    return flagged_columns(batch, result, scheme=scheme, probabilities=probabilities)


def _check_columns(batch: ProfileBatch, rules: Any) -> dict[str, AddedColumn]:
    from qcflag.io import AddedColumn
    from qcflag.rules import load_rules, run_checks

    rs = load_rules(rules)
    table = run_checks(batch, rs)
    cols: dict[str, AddedColumn] = {}
    for (check, var), res in table.results.items():
        cols[f"{var}_{check}"] = AddedColumn(res.statistic, {
            "long_name": f"{check} test statistic of {var}",
            "comment": f"rule set {rs.name!r}; NaN where the check does not apply",
            "coverage_content_type": "qualityInformation",
        }, var)
        cols[f"{var}_{check}_grade"] = AddedColumn(res.grade, {
            "long_name": f"{check} test grade of {var}",
            "flag_values": np.array([0, 1, 3, 4], dtype=np.int8),
            "flag_meanings": "not_applicable pass probably_bad bad",
            "coverage_content_type": "qualityInformation",
            "comment": f"rule set {rs.name!r}; grade the published rule gives",
        }, var)
    return cols


def _fill_for(values: np.ndarray, attrs: Mapping[str, Any]) -> Any:
    if "flag_values" in attrs and values.dtype.kind in "iu":
        return FLAG_FILL
    if values.dtype.kind == "f":
        return np.nan
    if values.dtype.kind in "iu":
        return values.dtype.type(0)
    return ""


def _scatter(values: np.ndarray, attrs: Mapping[str, Any], pos: np.ndarray,
             shape: tuple[int, ...]) -> np.ndarray:
    """Place per-level values on the layout's cells; fill elsewhere."""
    from qcflag.schemes import NO_FLAG

    values = np.asarray(values)
    fill = _fill_for(values, attrs)
    if "flag_values" in attrs and values.dtype.kind in "iu":
        values = np.where(values == NO_FLAG, FLAG_FILL, values).astype(np.int8)
    elif values.dtype.kind in "OUS":
        values = pd.Series(values).fillna("").astype(str).to_numpy(dtype=object)
    out = np.full(math.prod(shape), fill, dtype=values.dtype)
    out[pos] = values
    return out.reshape(shape)


def _block(ds: xr.Dataset, layout: _Layout, make: Callable[[ProfileBatch],
           dict[str, AddedColumn]], scheme: str | None, source: str | None
           ) -> dict[str, np.ndarray]:
    """Flag (or check) one in-memory block; arrays shaped like the block's level cells."""
    batch, pos, shape = _read_block(ds, layout, scheme, source)
    cols = make(batch)
    return {name: _scatter(col.values, col.attrs, pos, shape) for name, col in cols.items()}


# --------------------------------------------------------------------------- template
def _template_batch() -> ProfileBatch:
    """Make a tiny invented profile, used to learn the output names and attributes."""
    from qcflag.profiles import ProfileBatch

    return ProfileBatch(
        offsets=np.array([0, 4]),
        pressure=np.array([5.0, 50.0, 200.0, 800.0]),
        temperature=np.array([15.0, 14.0, 12.0, 9.0]),
        salinity=np.array([35.6, 35.7, 35.8, 35.6]),
        profiles=pd.DataFrame({"profile_id": ["template"], "cruise": ["template"],
                               "time": pd.to_datetime(["2020-06-01"]),
                               "latitude": [40.0], "longitude": [-20.0],
                               "platform": [""]}),
    )


# --------------------------------------------------------------------------- assembly
def _history(ds: xr.Dataset, history: str | None) -> str:
    from qcflag.io.netcdf import history_line

    line = history_line(history or "qcflag.flag_dataset (Python API)")
    old = str(ds.attrs.get("history", "")).rstrip()
    return f"{old}\n{line}" if old else line


def _assemble(ds: xr.Dataset, layout: _Layout, arrays: Mapping[str, Any],
              attrs: Mapping[str, tuple[dict[str, Any], str | None]],
              history: str | None) -> xr.Dataset:
    """Return a shallow copy of `ds` with the new variables, ancillary links and history."""
    import xarray as xr

    out = ds.copy(deep=False)
    links: dict[str, list[str]] = {}
    for name, data in arrays.items():
        col_attrs, parent = attrs[name]
        a = {k: v for k, v in col_attrs.items() if k != "_FillValue"}
        enc: dict[str, Any] = {}
        if "flag_values" in a and np.dtype(data.dtype).kind in "iu":
            a["flag_values"] = np.asarray(a["flag_values"], dtype=np.int8)
            enc["_FillValue"] = FLAG_FILL
        elif np.dtype(data.dtype).kind == "f":
            enc["_FillValue"] = np.nan
        var = xr.Variable(layout.level_dims, data, a)
        var.encoding = enc
        out[name] = var
        if parent is not None and parent in layout.parents:
            links.setdefault(layout.parents[parent], []).append(name)
    for parent_name, names in links.items():
        pv = out[parent_name].variable.copy(deep=False)
        old = str(pv.attrs.get("ancillary_variables", "")).split()
        pv.attrs = {**pv.attrs,
                    "ancillary_variables": " ".join([*old, *[n for n in names
                                                             if n not in old]])}
        if parent_name in out.coords:
            out = out.assign_coords({parent_name: pv})
        else:
            out[parent_name] = pv
    out.attrs = {**ds.attrs, "history": _history(ds, history)}
    return out


def _is_lazy(ds: xr.Dataset, layout: _Layout) -> bool:
    return any(ds[v].chunks is not None for v in layout.parents.values())


def _blocks(ds: xr.Dataset, layout: _Layout) -> list[dict[Hashable, slice]]:
    """Profile-aligned blocks as ``isel`` indexers, in order, covering every cell."""
    temp = ds[layout.parents["temperature"]]
    if layout.kind == "contiguous" and layout.count is not None:
        sample = layout.level_dims[0]
        n_obs = int(ds.sizes[sample])
        raw_counts, cruises = _profile_values(ds, layout.count, _cruise_name(ds, layout))
        counts = np.maximum(np.nan_to_num(np.asarray(raw_counts, dtype=np.float64)),
                            0).astype(np.int64)
        offsets = np.concatenate([[0], np.cumsum(counts)])
        chunks = temp.chunks[0] if temp.chunks else (n_obs,)
        wanted = np.cumsum((0, *chunks))[:-1]
        starts = np.searchsorted(offsets, wanted, "left")
        starts = np.unique(np.concatenate([[0], _cruise_cuts(cruises, starts)]))
        starts = starts[starts < max(counts.size, 1)]
        ends = np.append(starts[1:], counts.size)
        out: list[dict[Hashable, slice]] = [
            {layout.instance_dim: slice(int(a), int(b)),
             sample: slice(int(offsets[a]), int(offsets[b]) if b < counts.size else n_obs)}
            for a, b in zip(starts, ends, strict=True)
        ]
        return out
    if layout.instance_dim is not None and layout.kind in ("multidimensional", "argo"):
        axis = layout.level_dims.index(layout.instance_dim)
        n = int(ds.sizes[layout.instance_dim])
        chunks = temp.chunks[axis] if temp.chunks else (n,)
        edges = np.cumsum((0, *chunks))
        _, cruises = _profile_values(ds, None, _cruise_name(ds, layout))
        edges = np.unique(np.concatenate([[0], _cruise_cuts(cruises, edges[1:-1]), [n]]))
        return [{layout.instance_dim: slice(int(a), int(b))}
                for a, b in itertools.pairwise(edges)]
    return [{}]


_CRUISE_NAMES = ("cruise", "cruise_id", "expocode", "cruise_name")


def _cruise_name(ds: xr.Dataset, layout: _Layout) -> str | None:
    """Return the per-profile cruise variable's name, None if the dataset has none."""
    return next((v for v in _CRUISE_NAMES if v in ds.variables
                 and ds[v].dims == (layout.instance_dim,)), None)


def _profile_values(ds: xr.Dataset, *names: str | None) -> list[Any]:
    """Values of small per-profile variables, lazy ones computed together in one pass."""
    import dask

    arrays = [None if n is None else ds[n].data for n in names]
    return list(dask.compute(*arrays)) if any(
        a is not None and not isinstance(a, np.ndarray) for a in arrays
    ) else arrays


def _cruise_cuts(cruises: Any, cuts: Any) -> np.ndarray:
    """Move wanted block cuts (profile indices) forward so that no cruise is split.

    Checks that compare a profile with its cruise (impossible speed along a track) and the
    cruise-relative features then see, block by block, what they see in the whole dataset.
    Without a per-profile cruise variable (`cruises` None) the cuts stay where they are.
    """
    cuts = np.asarray(cuts, dtype=np.int64)
    if cruises is None or cuts.size == 0:
        return cuts
    from qcflag.profiles import whole_group_ends

    ends = whole_group_ends(np.asarray(cruises).astype(str))
    return ends[np.minimum(np.searchsorted(ends, cuts, "left"), ends.size - 1)]


def _run(ds: xr.Dataset, kind: Kind, make: Callable[[ProfileBatch], dict[str, AddedColumn]],
         *, scheme: str | None, source: str | None, history: str | None) -> xr.Dataset:
    layout = _layout(ds)
    if not _is_lazy(ds, layout):
        batch, pos, shape = _read_block(ds, layout, scheme, source)
        cols = make(batch)
        arrays = {n: _scatter(c.values, c.attrs, pos, shape) for n, c in cols.items()}
        meta = {n: (dict(c.attrs), c.parent) for n, c in cols.items()}
        return _assemble(ds, layout, arrays, meta, history)

    import dask
    import dask.array as da

    template = make(_template_batch())
    meta = {n: (dict(c.attrs), c.parent) for n, c in template.items()}
    dtypes = {n: _scatter(c.values, c.attrs, np.arange(c.values.size),
                          (c.values.size,)).dtype for n, c in template.items()}
    blocks = _blocks(ds, layout)
    pieces: dict[str, list[Any]] = {n: [] for n in template}
    task = dask.delayed(_block, pure=True)
    for k, idx in enumerate(blocks):
        sub = ds.isel(idx) if idx else ds
        shape = tuple(int(sub.sizes[d]) for d in layout.level_dims)
        res = task(sub, layout, make, scheme, source,
                   dask_key_name=f"qcflag-{kind}-block-{k}-{dask.base.tokenize(sub, kind)}")
        for name in template:
            item = dask.delayed(operator.getitem, pure=True)(res, name)
            pieces[name].append(da.from_delayed(item, shape=shape, dtype=dtypes[name]))
    axis = 0
    if layout.instance_dim is not None and layout.instance_dim in layout.level_dims:
        axis = layout.level_dims.index(layout.instance_dim)
    arrays = {n: (p[0] if len(p) == 1 else da.concatenate(p, axis=axis))
              for n, p in pieces.items()}
    return _assemble(ds, layout, arrays, meta, history)


# --------------------------------------------------------------------------- public API
def flag_dataset(
    ds: xr.Dataset,
    model: Any = None,
    rules: Any = None,
    *,
    scheme: str = "argo",
    probabilities: bool = False,
    input_scheme: str | None = None,
    source: str | None = None,
    history: str | None = None,
    **options: Any,
) -> xr.Dataset:
    """Flag every level of a profile dataset; return a new dataset with the flags added.

    Parameters
    ----------
    ds : xarray.Dataset
        CF DSG profile dataset (any of the four layouts or a single profile) or Argo-format
        profile dataset, numpy- or dask-backed. It is not modified.
    model : QCModel or path-like, optional
        Fitted model or its file (:func:`qcflag.learn.load_model`); None gives rules-only
        flags.
    rules : str, path-like or RuleSet, optional
        Rule set (default: the standard set).
    scheme : str, default="argo"
        Flag scheme of the new flag variables.
    probabilities : bool, default=False
        Also add the fused grade probabilities (model runs only).
    input_scheme : str, optional
        Flag scheme of the dataset's manual flags where its metadata names none.
    source : str, optional
        Name used in error messages (e.g. the file the dataset came from).
    history : str, optional
        Command or complete line appended to the global ``history``.
    **options
        Passed to :func:`qcflag.pipeline.flag_batch` (``caution``, ``target_recall``,
        ``review_budget``, ``false_alarm_rate``).

    Returns
    -------
    xarray.Dataset
        All of `ds` plus ``<var>_flag_auto``, ``<var>_flag_auto_confidence`` and
        ``<var>_flag_auto_reasons`` on the data variables' own dimensions (fill where a
        cell holds no level), linked through the parents' ``ancillary_variables``. Lazy
        (dask) when `ds` is, computed block by block of whole profiles.

    Raises
    ------
    InputFileError
        If the dataset is not a profile dataset qcflag can read.

    See Also
    --------
    check_dataset : the check statistics and grades instead of the combined flags.
    qcflag.pipeline.flag_files : the same on files.

    Examples
    --------
    >>> import qcflag, xarray as xr                       # doctest: +SKIP
    >>> out = xr.open_dataset("casts.nc").qcflag.flag()   # doctest: +SKIP
    >>> out["temperature_flag_auto"]                       # doctest: +SKIP
    """
    if model is not None and not hasattr(model, "predict_proba"):
        from qcflag.learn import load_model

        model = load_model(model)

    def make(batch: ProfileBatch) -> dict[str, AddedColumn]:
        return _flag_columns(batch, model, rules, scheme, probabilities, options)

    return _run(ds, "flag", make, scheme=input_scheme, source=source, history=history)


def check_dataset(
    ds: xr.Dataset,
    rules: Any = None,
    *,
    input_scheme: str | None = None,
    source: str | None = None,
    history: str | None = None,
) -> xr.Dataset:
    """Run the rule set's checks on a profile dataset; add each statistic and grade.

    Parameters
    ----------
    ds : xarray.Dataset
        Profile dataset, as for :func:`flag_dataset`; not modified.
    rules : str, path-like or RuleSet, optional
        Rule set (default: the standard set).
    input_scheme, source, history
        As for :func:`flag_dataset`.

    Returns
    -------
    xarray.Dataset
        All of `ds` plus ``<var>_<check>`` (the test statistic, NaN where the check does not
        apply) and ``<var>_<check>_grade`` (0 not applicable, 1 pass, 3 probably bad,
        4 bad) for every ``(check, variable)`` the rule set produced, on the data
        variables' own dimensions.
    """
    from qcflag.rules import load_rules

    rs = load_rules(rules)

    def make(batch: ProfileBatch) -> dict[str, AddedColumn]:
        return _check_columns(batch, rs)

    return _run(ds, "check", make, scheme=input_scheme, source=source, history=history)
