"""Loaders and interpolators for the packaged climatology and bathymetry.

The packaged files (built by :mod:`qcflag.reference.build` from Debian's ``ferret-datasets``)
are read once and cached. Interpolation is vectorised over thousands of positions at once:

* horizontally, bilinear on the grid with the longitude wrapping around the globe; corners
  that are land (no climatology) get no weight and the remaining weights are renormalised, so
  a position next to a coast takes the values of its ocean corners only. A position whose
  four corners are all land has no climatology (NaN). Latitudes beyond the outermost grid rows
  take the outermost row's values.
* vertically (climatology only), linear in depth between the two standard depths around each
  level, after converting pressure to depth with TEOS-10 (``gsw.z_from_p``). Levels above 0 m
  take the surface value; levels deeper than the deepest standard depth (5000 m) or below the
  deepest standard depth that has data at the position get NaN (no extrapolation, because
  the climatology says nothing there).

The variability fields ``t_sd`` and ``s_sd`` are an *estimate* derived from the annual mean
field, not measured climatological standard deviations; :mod:`qcflag.reference.build`
documents the formula, and the files' ``variability_method`` attribute repeats it. The
Levitus salinities are used as practical salinity.

Automated flags based on these fields assist expert quality control; they do not replace it.
"""

from __future__ import annotations

import weakref
from dataclasses import dataclass
from functools import lru_cache
from pathlib import Path
from typing import TYPE_CHECKING, Any, Literal

import numpy as np

from qcflag.exceptions import InputFileError

if TYPE_CHECKING:
    import xarray as xr
    from numpy.typing import ArrayLike, NDArray

    from qcflag.profiles import ProfileBatch

__all__ = [
    "BATHYMETRY_PATH",
    "CLIMATOLOGY_PATH",
    "ClimatologyAtLevels",
    "ClimatologyColumns",
    "climatology_at",
    "climatology_columns",
    "climatology_for",
    "level_depth",
    "load_bathymetry",
    "load_climatology",
    "pressure_to_depth",
    "seafloor_depth",
]

_DATA = Path(__file__).resolve().parent / "data"
CLIMATOLOGY_PATH = _DATA / "climatology_annual.nc"
"""The packaged annual climatology (see :mod:`qcflag.reference.build`)."""
BATHYMETRY_PATH = _DATA / "bathymetry.nc"
"""The packaged 10-arcminute bathymetry (see :mod:`qcflag.reference.build`)."""

_FIELDS = ("t_mean", "s_mean", "t_sd", "s_sd")
_CHUNK = 50_000  # positions per interpolation chunk (bounds the temporary memory)


def _missing(path: Path) -> InputFileError:
    return InputFileError(
        path, "packaged reference file is missing",
        "reinstall qcflag or rebuild it with: python -m qcflag.reference.build",
    )


# ----------------------------------------------------------------------------- loading
def load_climatology() -> xr.Dataset:
    """Return the packaged annual climatology as an xarray Dataset (cached; do not modify).

    Returns
    -------
    xarray.Dataset
        Coordinates ``depth`` (m, 20 standard depths 0-5000), ``lat`` (degrees north,
        -89.5..89.5), ``lon`` (degrees east, 0.5..359.5); variables ``t_mean`` (degC),
        ``s_mean`` (practical salinity), ``t_sd``, ``s_sd`` (estimated variability, same
        units), NaN on land. Global attributes hold the provenance and the variability method.

    Raises
    ------
    InputFileError
        If the packaged file is missing.
    """
    return _load_xr(str(CLIMATOLOGY_PATH))


def load_bathymetry() -> xr.Dataset:
    """Return the packaged bathymetry as an xarray Dataset (cached; do not modify).

    Returns
    -------
    xarray.Dataset
        Coordinates ``lat``, ``lon`` (10-arcminute block centres); variable ``elevation``
        (m, positive up: the ocean floor is negative). Global attributes hold the provenance.

    Raises
    ------
    InputFileError
        If the packaged file is missing.
    """
    return _load_xr(str(BATHYMETRY_PATH))


@lru_cache(maxsize=2)
def _load_xr(path: str) -> xr.Dataset:
    import xarray as xr

    if not Path(path).is_file():
        raise _missing(Path(path))
    with xr.open_dataset(path) as ds:
        return ds.load()


@dataclass(frozen=True)
class _Grid:
    """A regular lat/lon grid of stacked values, shape (n_lat, n_lon, n_fields)."""

    lat0: float
    dlat: float
    lon0: float
    dlon: float
    values: NDArray[np.float32]
    depth: NDArray[np.float64]

    @property
    def shape(self) -> tuple[int, int]:
        return int(self.values.shape[0]), int(self.values.shape[1])


def _axis(values: NDArray[np.float64], name: str, path: Path) -> tuple[float, float]:
    step = np.diff(values)
    if values.size < 2 or not np.allclose(step, step[0], rtol=0, atol=1e-6):
        raise InputFileError(path, f"{name} axis is not regular", "rebuild the reference files")
    return float(values[0]), float(step.mean())


@lru_cache(maxsize=1)
def _climatology_grid() -> _Grid:
    import netCDF4

    path = CLIMATOLOGY_PATH
    if not path.is_file():
        raise _missing(path)
    with netCDF4.Dataset(path) as ds:
        lat = np.asarray(ds["lat"][:], dtype=np.float64)
        lon = np.asarray(ds["lon"][:], dtype=np.float64)
        depth = np.asarray(ds["depth"][:], dtype=np.float64)
        # stack to (lat, lon, field, depth) so one gather fetches whole columns
        stack = np.stack(
            [np.ma.filled(ds[f][:].astype(np.float32), np.nan) for f in _FIELDS], axis=0
        )
    values = np.ascontiguousarray(stack.transpose(2, 3, 0, 1).reshape(lat.size, lon.size, -1))
    lat0, dlat = _axis(lat, "lat", path)
    lon0, dlon = _axis(lon, "lon", path)
    return _Grid(lat0, dlat, lon0, dlon, values, depth)


@lru_cache(maxsize=1)
def _bathymetry_grid() -> _Grid:
    import netCDF4

    path = BATHYMETRY_PATH
    if not path.is_file():
        raise _missing(path)
    with netCDF4.Dataset(path) as ds:
        lat = np.asarray(ds["lat"][:], dtype=np.float64)
        lon = np.asarray(ds["lon"][:], dtype=np.float64)
        elev = np.asarray(ds["elevation"][:], dtype=np.float32)
    lat0, dlat = _axis(lat, "lat", path)
    lon0, dlon = _axis(lon, "lon", path)
    return _Grid(lat0, dlat, lon0, dlon, np.ascontiguousarray(elev[:, :, None]),
                 np.zeros(0))


# ----------------------------------------------------------------------- interpolation
def _corners(
    grid: _Grid, lat: NDArray[np.float64], lon: NDArray[np.float64]
) -> tuple[NDArray[np.float64], NDArray[np.intp], NDArray[np.intp], NDArray[np.bool_]]:
    """Return bilinear weights (4, n), row and column indices (4, n) and validity (n,)."""
    n_lat, n_lon = grid.shape
    ok = np.isfinite(lat) & np.isfinite(lon) & (np.abs(lat) <= 90.0)
    la = np.where(ok, lat, 0.0)
    lo = np.where(ok, lon, 0.0)
    fy = np.clip((la - grid.lat0) / grid.dlat, 0.0, n_lat - 1.0)
    j0 = np.minimum(np.floor(fy).astype(np.intp), n_lat - 2)
    wy = fy - j0
    fx = np.mod((lo - grid.lon0) / grid.dlon, n_lon)
    i0f = np.floor(fx)
    wx = fx - i0f
    i0 = i0f.astype(np.intp) % n_lon
    i1 = (i0 + 1) % n_lon
    w = np.stack([(1 - wy) * (1 - wx), (1 - wy) * wx, wy * (1 - wx), wy * wx])
    rows = np.stack([j0, j0, j0 + 1, j0 + 1])
    cols = np.stack([i0, i1, i0, i1])
    return w, rows, cols, ok


def _horizontal(
    grid: _Grid, lat: NDArray[np.float64], lon: NDArray[np.float64],
    method: Literal["bilinear", "deepest", "nearest"] = "bilinear",
) -> NDArray[np.float64]:
    """Interpolate every stacked field of `grid` to n positions; shape (n, n_fields)."""
    n = lat.size
    out = np.full((n, grid.values.shape[2]), np.nan)
    for start in range(0, n, _CHUNK):  # chunks bound memory; each chunk is vectorised
        sl = slice(start, min(start + _CHUNK, n))
        w, rows, cols, ok = _corners(grid, lat[sl], lon[sl])
        flat = grid.values.reshape(-1, grid.values.shape[2])
        v = np.take(flat, rows * grid.shape[1] + cols, axis=0).astype(np.float64)  # (4, m, f)
        if method == "deepest":
            res = np.min(v, axis=0)  # lowest elevation of the four nodes
        elif method == "nearest":
            pick = np.argmax(w, axis=0)
            res = np.take_along_axis(v, pick[None, :, None], axis=0)[0]
        else:
            valid = ~np.isnan(v)
            wv = w[:, :, None] * valid
            den = wv.sum(axis=0)
            num = (wv * np.where(valid, v, 0.0)).sum(axis=0)
            with np.errstate(invalid="ignore", divide="ignore"):
                res = np.where(den > 0, num / den, np.nan)
        res[~ok] = np.nan
        out[sl] = res
    return out


def _as_1d(name: str, values: ArrayLike) -> NDArray[np.float64]:
    arr = np.atleast_1d(np.asarray(values, dtype=np.float64))
    if arr.ndim != 1:
        raise ValueError(f"{name}: expected a scalar or a 1-D array, got shape {arr.shape}")
    return arr


@dataclass(frozen=True)
class ClimatologyColumns:
    """Climatology interpolated horizontally to positions, on the standard depths.

    Attributes
    ----------
    depth : ndarray of shape (n_depth,)
        Standard depths, m.
    t_mean, s_mean, t_sd, s_sd : ndarray of shape (n_positions, n_depth)
        Annual mean temperature (degC), practical salinity, and their estimated variability;
        NaN on land and below the local sea floor of the climatology.
    """

    depth: NDArray[np.float64]
    t_mean: NDArray[np.float64]
    s_mean: NDArray[np.float64]
    t_sd: NDArray[np.float64]
    s_sd: NDArray[np.float64]


@dataclass(frozen=True)
class ClimatologyAtLevels:
    """Climatology interpolated to every level.

    Attributes
    ----------
    t_mean, s_mean, t_sd, s_sd : ndarray of shape (n_levels,)
        Annual mean temperature (degC), practical salinity and their estimated variability
        at each level; NaN where there is no climatology (land, invalid position or
        pressure, below the deepest standard depth with data at the position).
    depth : ndarray of shape (n_levels,)
        Depth of each level, m (positive down, from ``gsw.z_from_p``).
    """

    t_mean: NDArray[np.float64]
    s_mean: NDArray[np.float64]
    t_sd: NDArray[np.float64]
    s_sd: NDArray[np.float64]
    depth: NDArray[np.float64]

    def mean(self, variable: str) -> NDArray[np.float64]:
        """Return the mean for ``"temperature"`` or ``"salinity"``."""
        return {"temperature": self.t_mean, "salinity": self.s_mean}[variable]

    def sd(self, variable: str) -> NDArray[np.float64]:
        """Return the variability estimate for ``"temperature"`` or ``"salinity"``."""
        return {"temperature": self.t_sd, "salinity": self.s_sd}[variable]


def _columns(lat: NDArray[np.float64], lon: NDArray[np.float64]) -> NDArray[np.float64]:
    """Horizontal interpolation of all fields; shape (n, n_fields, n_depth)."""
    grid = _climatology_grid()
    flat = _horizontal(grid, lat, lon)
    return flat.reshape(lat.size, len(_FIELDS), grid.depth.size)


def climatology_columns(latitude: ArrayLike, longitude: ArrayLike) -> ClimatologyColumns:
    """Interpolate the climatology horizontally to positions (all standard depths).

    Parameters
    ----------
    latitude, longitude : array-like of shape (n_positions,) or scalar
        Position, degrees north and degrees east (any longitude convention).

    Returns
    -------
    ClimatologyColumns
    """
    lat = _as_1d("latitude", latitude)
    lon = _as_1d("longitude", longitude)
    lat, lon = np.broadcast_arrays(lat, lon)
    cols = _columns(np.ascontiguousarray(lat), np.ascontiguousarray(lon))
    return ClimatologyColumns(_climatology_grid().depth.copy(),
                              *(cols[:, f, :] for f in range(len(_FIELDS))))


def pressure_to_depth(pressure: ArrayLike, latitude: ArrayLike) -> NDArray[np.float64]:
    """Convert sea pressure (dbar) to depth (m, positive down) with TEOS-10 ``gsw.z_from_p``.

    Parameters
    ----------
    pressure : array-like
        Sea pressure, dbar.
    latitude : array-like
        Latitude, degrees north, broadcastable against `pressure`.

    Returns
    -------
    ndarray of float64
        Depth, m.
    """
    import gsw

    p = np.asarray(pressure, dtype=np.float64)
    lat = np.clip(np.asarray(latitude, dtype=np.float64), -90.0, 90.0)
    return -np.asarray(gsw.z_from_p(p, lat), dtype=np.float64)


def climatology_at(
    latitude: ArrayLike,
    longitude: ArrayLike,
    pressure: ArrayLike,
    profile_index: ArrayLike | None = None,
    *,
    depth: ArrayLike | None = None,
) -> ClimatologyAtLevels:
    """Interpolate the climatology to levels.

    The horizontal interpolation is done once per position, then linearly in depth per level.

    Parameters
    ----------
    latitude, longitude : array-like
        Positions, degrees north / east. With `profile_index`, one per profile, shape
        (n_profiles,); without it, scalars (one profile) or one per level, shape (n_levels,).
    pressure : array-like of shape (n_levels,)
        Sea pressure, dbar.
    profile_index : array-like of int, shape (n_levels,), optional
        Profile number (index into `latitude`/`longitude`) of each level.
    depth : array-like of shape (n_levels,), optional
        Depth of each level, m, when already computed with :func:`pressure_to_depth` from
        these pressures and latitudes (saves converting again).

    Returns
    -------
    ClimatologyAtLevels
        Fields of shape (n_levels,); NaN where there is no climatology.

    Raises
    ------
    ValueError
        If the shapes do not fit together.
    """
    p = _as_1d("pressure", pressure)
    lat = _as_1d("latitude", latitude)
    lon = _as_1d("longitude", longitude)
    if lat.shape != lon.shape:
        raise ValueError("latitude and longitude must have the same shape")
    if profile_index is None:
        if lat.size == 1:
            idx = np.zeros(p.size, dtype=np.intp)
        elif lat.size == p.size:
            idx = np.arange(p.size, dtype=np.intp)
        else:
            raise ValueError(
                "without profile_index, latitude/longitude must be scalars or one per level"
            )
    else:
        idx = np.asarray(profile_index, dtype=np.intp)
        if idx.shape != p.shape:
            raise ValueError("profile_index must have one entry per pressure level")
        if idx.size and (idx.min() < 0 or idx.max() >= lat.size):
            raise ValueError("profile_index points outside latitude/longitude")
    grid = _climatology_grid()
    zstd = grid.depth
    cols = _columns(lat, lon)  # (n_pos, n_fields, n_depth)
    if depth is None:
        depth = pressure_to_depth(p, lat[idx])
    else:
        depth = _as_1d("depth", depth)
        if depth.shape != p.shape:
            raise ValueError("depth must have one entry per pressure level")
    d = np.maximum(depth, zstd[0])  # above the surface level: surface value
    inside = np.isfinite(d) & (d <= zstd[-1])
    dd = np.where(inside, d, zstd[0])
    k = np.clip(np.searchsorted(zstd, dd, side="right") - 1, 0, zstd.size - 2)
    dz = zstd[k + 1] - zstd[k]
    w = (dd - zstd[k]) / dz
    # snap to a standard depth within a micrometre, so float rounding of the pressure-depth
    # conversion cannot lose the deepest valid level to its missing neighbour
    w = np.where(w * dz < 1e-6, 0.0, np.where((1.0 - w) * dz < 1e-6, 1.0, w))
    row = idx * zstd.size + k  # standard depth k of the level's column, per field below
    at_upper = np.flatnonzero(w == 0.0)
    at_lower = np.flatnonzero(w == 1.0)
    outside = np.flatnonzero(~inside)
    fields = []
    for f in range(len(_FIELDS)):
        col = np.ascontiguousarray(cols[:, f, :]).ravel()  # (n_pos * n_depth,), small
        upper = col[row]
        lower = col[row + 1]
        val = lower - upper
        val *= w
        val += upper
        val[at_upper] = upper[at_upper]  # exactly the standard-depth value (also where the
        val[at_lower] = lower[at_lower]  # other neighbour is missing)
        val[outside] = np.nan
        fields.append(val)
    return ClimatologyAtLevels(*fields, depth=depth)


def climatology_for(batch: ProfileBatch) -> ClimatologyAtLevels:
    """Interpolate the climatology to every level of a batch.

    Parameters
    ----------
    batch : ProfileBatch

    Returns
    -------
    ClimatologyAtLevels
        Fields of shape (batch.n_levels,), read-only; computed once per batch and shared
        by later calls with the same batch.
    """
    cached = _PER_BATCH.get(batch)
    if cached is None:
        cached = climatology_at(
            batch.profiles["latitude"].to_numpy(dtype=np.float64),
            batch.profiles["longitude"].to_numpy(dtype=np.float64),
            batch.pressure,
            batch.profile_index,
            depth=level_depth(batch),
        )
        for arr in (cached.t_mean, cached.s_mean, cached.t_sd, cached.s_sd, cached.depth):
            arr.setflags(write=False)  # shared between the checks of this batch
        _PER_BATCH[batch] = cached
    return cached


def level_depth(batch: ProfileBatch) -> NDArray[np.float64]:
    """Depth of every level of a batch, m (positive down; :func:`pressure_to_depth`).

    Computed once per batch and shared by the checks that need it (climatology, sea floor).

    Parameters
    ----------
    batch : ProfileBatch

    Returns
    -------
    ndarray of float64, shape (batch.n_levels,)
        Read-only.
    """
    depth = _DEPTH.get(batch)
    if depth is None:
        lat = batch.profiles["latitude"].to_numpy(dtype=np.float64)
        depth = pressure_to_depth(batch.pressure, lat[batch.profile_index])
        depth.setflags(write=False)
        _DEPTH[batch] = depth
    return depth


_DEPTH: weakref.WeakKeyDictionary[Any, NDArray[np.float64]] = weakref.WeakKeyDictionary()
_PER_BATCH: weakref.WeakKeyDictionary[Any, ClimatologyAtLevels] = weakref.WeakKeyDictionary()
"""Climatology at the levels of live batches (batches are immutable; entries go with them),
so the temperature and salinity steps interpolate once per batch."""


def seafloor_depth(
    latitude: ArrayLike,
    longitude: ArrayLike,
    *,
    method: Literal["bilinear", "deepest", "nearest"] = "bilinear",
) -> NDArray[np.float64]:
    """Depth of the sea floor at positions from the packaged bathymetry.

    Parameters
    ----------
    latitude, longitude : array-like
        Positions, degrees north / east (any longitude convention); broadcast together.
    method : {"bilinear", "deepest", "nearest"}, default="bilinear"
        ``"bilinear"`` interpolates the four surrounding 10' nodes; ``"deepest"`` takes the
        deepest of them (a generous sea floor for a coarse grid: a position is only "on land"
        when all four nodes are land); ``"nearest"`` takes the nearest node.

    Returns
    -------
    ndarray of float64
        Sea-floor depth, m, positive down (negative on land: minus the elevation); NaN for an
        impossible position. Same shape as the broadcast inputs.
    """
    if method not in ("bilinear", "deepest", "nearest"):
        raise ValueError(f"method must be 'bilinear', 'deepest' or 'nearest', not {method!r}")
    lat, lon = np.broadcast_arrays(np.asarray(latitude, dtype=np.float64),
                                   np.asarray(longitude, dtype=np.float64))
    shape = lat.shape
    elev = _horizontal(_bathymetry_grid(), lat.ravel(), lon.ravel(), method)[:, 0]
    return -elev.reshape(shape)
