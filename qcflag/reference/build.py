"""Build the packaged reference fields from Debian's ``ferret-datasets`` package.

Run from the repository root::

    python -m qcflag.reference.build [--source DIR] [--out DIR]

`--source` defaults to ``/usr/share/ferret-vis/data`` (where Debian installs the package);
`--out` defaults to this package's ``data/`` folder. Two files are written (atomically):

``climatology_annual.nc``
    Annual mean temperature and salinity on the 20 standard depths (0-5000 m) of
    ``levitus_climatology.cdf`` (1 degree, whole world), longitudes rotated from the source's
    20.5..379.5 to 0.5..359.5, plus a variability *estimate* for each (see
    :func:`variability_estimate`). Packed as int16 (``scale_factor``/``add_offset``) with zlib.

``bathymetry.nc``
    Elevation of the Earth's surface (m, positive up, ocean floor negative) on a 10-arcminute
    grid: block means of 2 x 2 nodes of ``etopo5.cdf`` (5 arcminutes), int16 metres, zlib.

Provenance (Debian package name and version, source file names and sha256, build date, build
command, the variability method) is stored in each file's global attributes.

The variability estimate
------------------------
The Levitus annual file has no standard deviation, so one is *estimated* from the mean field
itself; it is not a measured climatological standard deviation. For variable X at depth level
k, latitude row j and longitude column i::

    sd = sqrt(floor**2 + spread**2 + (heave * gradient)**2)

* ``floor``: 0.5 degC for temperature and 0.1 for salinity. Judgement, in line with common
  practice: these are of the size of the inter-annual and mesoscale variability of the upper
  ocean in open-ocean climatologies, and keep the standardized anomaly finite where the
  annual mean field is flat.
* ``spread``: the population standard deviation of the valid (ocean) values of X in the
  3 x 3 neighbourhood of cells around (j, i) at level k, the centre included (longitude wraps
  around the globe; latitude is cut at the poles). It stands for fronts and eddies that move
  by about one grid cell (~100 km).
* ``gradient``: the larger of the absolute one-sided vertical gradients |dX/dz| to the level
  above and the level below (only those that exist and are ocean), per metre.
* ``heave``: 15 m, a typical vertical displacement of isopycnals by internal waves and
  eddies (judgement/common knowledge, an order of magnitude rather than a measured value).

Temperature gets one more term for the seasonal cycle, which the annual mean does not
resolve::

    sd_T = sqrt(floor**2 + spread**2 + (heave * gradient)**2 + (season * exp(-z / H))**2)

* ``season``: the standard deviation over the 12 months of the COADS monthly sea-surface
  temperature climatology (``coads_climatology.cdf``, same Debian package, 2-degree grid) in
  the 2-degree cell holding the 1-degree cell; where COADS has no value, the largest value
  among its eight neighbours, else 0.
* ``H``: 100 m, an e-folding depth for the seasonal signal, of the order of the seasonal
  mixed-layer depth (judgement).

Salinity has no seasonal term (no monthly salinity source in the package). All of this is an
*estimate*, the same in every season, which is why the climatology check gives "probably
bad" only (QARTOD) and its threshold is generous.
"""

from __future__ import annotations

import argparse
import datetime as _dt
import hashlib
import shlex
import subprocess
import sys
import warnings
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

from qcflag.exceptions import InputFileError
from qcflag.io.atomic import atomic_output

if TYPE_CHECKING:
    from numpy.typing import NDArray

__all__ = [
    "BATHYMETRY_FILE",
    "CLIMATOLOGY_FILE",
    "DEFAULT_SOURCE",
    "FLOORS",
    "HEAVE_M",
    "SEASONAL_EFOLD_M",
    "build",
    "main",
    "seasonal_sst_sd",
    "variability_estimate",
]

DEFAULT_SOURCE = Path("/usr/share/ferret-vis/data")
"""Where Debian's ``ferret-datasets`` package installs its files."""

DATA_DIR = Path(__file__).resolve().parent / "data"
CLIMATOLOGY_FILE = "climatology_annual.nc"
BATHYMETRY_FILE = "bathymetry.nc"
LEVITUS_SOURCE = "levitus_climatology.cdf"
COADS_SOURCE = "coads_climatology.cdf"
ETOPO_SOURCE = "etopo5.cdf"
DEBIAN_PACKAGE = "ferret-datasets"

FLOORS: dict[str, float] = {"temperature": 0.5, "salinity": 0.1}
"""Variability floor per variable (degC; PSS-78), judgement in line with common practice."""

HEAVE_M = 15.0
"""Typical isopycnal heave (m) used in the variability estimate (judgement)."""

SEASONAL_EFOLD_M = 100.0
"""e-folding depth (m) of the seasonal temperature term (judgement)."""

BATHY_BLOCK = 2
"""ETOPO5 nodes per block side: 2 x 2 blocks of 5' nodes give a 10' grid."""

# packing: value = stored * scale_factor + add_offset; -32768 is the fill value
_PACK: dict[str, tuple[float, float]] = {
    "t_mean": (0.001, 10.0),  # -22.8 .. 42.8 degC, step 0.001
    "s_mean": (0.001, 20.0),  # -12.8 .. 52.8, step 0.001
    "t_sd": (0.001, 16.0),  # -16.8 .. 48.8 degC, step 0.001
    "s_sd": (0.001, 16.0),
}
_FILL = np.int16(-32768)


def _sha256(path: Path) -> str:
    h = hashlib.sha256()
    with path.open("rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def _debian_version() -> str:
    """Return the version of the installed ferret-datasets package, or 'unknown'."""
    try:
        out = subprocess.run(
            ["dpkg-query", "-W", "-f=${Version}", DEBIAN_PACKAGE],
            capture_output=True, text=True, check=True, timeout=30,
        )
    except (OSError, subprocess.SubprocessError):
        return "unknown"
    return out.stdout.strip() or "unknown"


def _neighbourhood_spread(x: NDArray[np.float64]) -> NDArray[np.float64]:
    """Return the population SD of the valid values in the 3 x 3 neighbourhood of each cell.

    Parameters
    ----------
    x : ndarray of shape (n_depth, n_lat, n_lon)
        Field with NaN on land; longitude is periodic, latitude is cut at the edges.

    Returns
    -------
    ndarray of shape (n_depth, n_lat, n_lon)
        The spread; NaN where the centre cell is land.
    """
    pad = np.pad(x, ((0, 0), (1, 1), (0, 0)), constant_values=np.nan)
    count = np.zeros(x.shape)
    total = np.zeros(x.shape)
    total2 = np.zeros(x.shape)
    ny = x.shape[1]
    for dj in (-1, 0, 1):
        rows = pad[:, 1 + dj : 1 + dj + ny, :]
        for di in (-1, 0, 1):
            v = np.roll(rows, -di, axis=2)
            ok = ~np.isnan(v)
            count += ok
            vz = np.where(ok, v, 0.0)
            total += vz
            total2 += vz * vz
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = total / count
        var = np.maximum(total2 / count - mean * mean, 0.0)
    out = np.sqrt(var)
    out[np.isnan(x)] = np.nan
    return out


def _vertical_gradient(x: NDArray[np.float64], depth: NDArray[np.float64]) -> NDArray[np.float64]:
    """Return the larger absolute one-sided vertical gradient per cell (per m; 0 if none)."""
    dz = np.diff(depth)[:, None, None]
    slope = np.abs(np.diff(x, axis=0)) / dz  # between level k and k+1; NaN if either is land
    nan_row = np.full((1, *x.shape[1:]), np.nan)
    above = np.concatenate([nan_row, slope], axis=0)
    below = np.concatenate([slope, nan_row], axis=0)
    g = np.fmax(above, below)  # fmax ignores NaN
    g = np.where(np.isnan(g), 0.0, g)
    g[np.isnan(x)] = np.nan
    return g


def variability_estimate(
    x: NDArray[np.float64],
    depth: NDArray[np.float64],
    *,
    floor: float,
    heave: float = HEAVE_M,
    season: NDArray[np.float64] | None = None,
    efold: float = SEASONAL_EFOLD_M,
) -> NDArray[np.float64]:
    """Estimate a standard deviation for an annual-mean field (see the module docstring).

    Parameters
    ----------
    x : ndarray of shape (n_depth, n_lat, n_lon)
        Annual mean on the standard depths, NaN on land; longitude periodic.
    depth : ndarray of shape (n_depth,)
        Standard depths, m, increasing.
    floor : float
        Variability floor, units of `x`.
    heave : float, default=HEAVE_M
        Typical isopycnal displacement, m.
    season : ndarray of shape (n_lat, n_lon), optional
        Seasonal standard deviation at the surface (see :func:`seasonal_sst_sd`).
    efold : float, default=SEASONAL_EFOLD_M
        e-folding depth of the seasonal term, m.

    Returns
    -------
    ndarray of shape (n_depth, n_lat, n_lon)
        ``sqrt(floor**2 + spread**2 + (heave * gradient)**2 [+ (season * exp(-z/efold))**2])``;
        NaN on land.
    """
    spread = _neighbourhood_spread(x)
    grad = _vertical_gradient(x, depth)
    var = floor**2 + spread**2 + (heave * grad) ** 2
    if season is not None:
        var = var + (season[None, :, :] * np.exp(-depth / efold)[:, None, None]) ** 2
    return np.sqrt(var)


def seasonal_sst_sd(
    path: Path, lat: NDArray[np.float64], lon: NDArray[np.float64]
) -> NDArray[np.float64]:
    """Return the SD over 12 months of COADS monthly SST on a 1-degree grid.

    Parameters
    ----------
    path : Path
        ``coads_climatology.cdf``.
    lat, lon : ndarray
        Centres of the target cells, degrees (lon in 0..360).

    Returns
    -------
    ndarray of shape (lat.size, lon.size)
        Population SD over the months of the COADS 2-degree cell holding each target cell;
        where that cell has no value in some month, the largest SD among its eight
        neighbours (longitude periodic), else 0.
    """
    import netCDF4

    try:
        with netCDF4.Dataset(path) as ds:
            cx = np.asarray(ds["COADSX"][:], dtype=np.float64)
            cy = np.asarray(ds["COADSY"][:], dtype=np.float64)
            sst = np.ma.filled(ds["SST"][:].astype(np.float64), np.nan)
    except (OSError, IndexError, KeyError) as exc:
        raise InputFileError(
            path, f"cannot read SST ({exc})", f"reinstall {DEBIAN_PACKAGE}"
        ) from None
    sd = np.std(sst, axis=0)  # NaN where any month is missing
    pad = np.pad(sd, ((1, 1), (0, 0)), constant_values=np.nan)
    ny = sd.shape[0]
    neigh = np.stack([np.roll(pad[1 + dj : 1 + dj + ny], -di, axis=1)
                      for dj in (-1, 0, 1) for di in (-1, 0, 1) if dj or di])
    with np.errstate(invalid="ignore"), warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # all-NaN neighbourhoods
        fill = np.nanmax(neigh, axis=0)
    sd = np.where(np.isnan(sd), fill, sd)
    sd = np.where(np.isnan(sd), 0.0, sd)
    dx, dy = cx[1] - cx[0], cy[1] - cy[0]
    ci = np.floor(np.mod(lon - (cx[0] - dx / 2), 360.0) / dx).astype(int) % cx.size
    cj = np.clip(np.floor((lat - (cy[0] - dy / 2)) / dy).astype(int), 0, cy.size - 1)
    return sd[cj[:, None], ci[None, :]]


def _pack(name: str, values: NDArray[np.float64]) -> NDArray[np.int16]:
    scale, offset = _PACK[name]
    q = np.round((values - offset) / scale)
    if np.nanmax(np.abs(q)) > 32767:
        raise ValueError(f"{name}: values exceed the int16 packing range")
    return np.where(np.isnan(q), _FILL, q).astype(np.int16)


def _common_attrs(sources: dict[str, Path], command: str) -> dict[str, str]:
    return {
        "Conventions": "CF-1.8",
        "source_package": f"Debian {DEBIAN_PACKAGE} {_debian_version()}",
        "source_files": ", ".join(sources),
        "source_sha256": ", ".join(f"{n}={_sha256(p)}" for n, p in sources.items()),
        "build_date": _dt.datetime.now(_dt.UTC).strftime("%Y-%m-%dT%H:%M:%SZ"),
        "build_command": command,
        "comment": (
            "Reference field for automated quality control; automated flags assist expert "
            "QC and do not replace it."
        ),
    }


def _read_levitus(path: Path) -> dict[str, NDArray[np.float64]]:
    import netCDF4

    try:
        with netCDF4.Dataset(path) as ds:
            lon = np.asarray(ds["XAXLEVITR"][:], dtype=np.float64)
            lat = np.asarray(ds["YAXLEVITR"][:], dtype=np.float64)
            depth = np.asarray(ds["ZAXLEVITR"][:], dtype=np.float64)
            t = np.ma.filled(ds["TEMP"][:].astype(np.float64), np.nan)
            s = np.ma.filled(ds["SALT"][:].astype(np.float64), np.nan)
    except (OSError, IndexError, KeyError) as exc:
        raise InputFileError(
            path, f"cannot read TEMP/SALT ({exc})", f"reinstall {DEBIAN_PACKAGE}"
        ) from None
    # rotate longitudes 20.5..379.5 -> 0.5..359.5
    lon = np.mod(lon, 360.0)
    order = np.argsort(lon, kind="stable")
    return {"lon": lon[order], "lat": lat, "depth": depth,
            "t": t[:, :, order], "s": s[:, :, order]}


def _write_climatology(src: Path, coads: Path, out: Path, command: str) -> Path:
    import netCDF4

    lev = _read_levitus(src)
    depth = lev["depth"]
    season = seasonal_sst_sd(coads, lev["lat"], lev["lon"])
    fields = {
        "t_mean": lev["t"],
        "s_mean": lev["s"],
        "t_sd": variability_estimate(lev["t"], depth, floor=FLOORS["temperature"],
                                     season=season),
        "s_sd": variability_estimate(lev["s"], depth, floor=FLOORS["salinity"]),
    }
    meta = {
        "t_mean": ("sea_water_temperature", "degC", "annual mean temperature"),
        "s_mean": ("sea_water_salinity", "1", "annual mean salinity"),
        "t_sd": (None, "degC", "estimated variability of temperature (not a measured SD)"),
        "s_sd": (None, "1", "estimated variability of salinity (not a measured SD)"),
    }
    method = (
        "sd = sqrt(floor**2 + spread**2 + (heave*gradient)**2); floor = "
        f"{FLOORS['temperature']} degC (T), {FLOORS['salinity']} (S), judgement in line with "
        "common practice; spread = population SD of the ocean values in the 3x3 neighbourhood "
        "of 1-degree cells at the same depth (longitude periodic); gradient = larger absolute "
        "one-sided vertical gradient |dX/dz| to the adjacent standard levels; heave = "
        f"{HEAVE_M} m typical isopycnal displacement (judgement). Temperature only adds "
        "(season*exp(-depth/H))**2 with season = SD over the 12 months of COADS monthly SST "
        "(coads_climatology.cdf, 2-degree cell holding the 1-degree cell; gaps filled with "
        f"the largest of the 8 neighbours, else 0) and H = {SEASONAL_EFOLD_M} m (judgement). "
        "An ESTIMATE, not a measured climatological standard deviation."
    )
    target = out / CLIMATOLOGY_FILE
    with atomic_output(target, overwrite=True) as tmp, netCDF4.Dataset(
        tmp, "w", format="NETCDF4"
    ) as ds:
        ds.setncatts(
            {
                "title": "Annual temperature and salinity climatology with variability estimate",
                **_common_attrs({src.name: src, coads.name: coads}, command),
                "variability_method": method,
                "history": (
                    "Levitus annual climatology from Debian ferret-datasets; longitudes rotated "
                    "from 20.5..379.5 to 0.5..359.5; variability estimated; packed int16"
                ),
            }
        )
        ds.createDimension("depth", depth.size)
        ds.createDimension("lat", lev["lat"].size)
        ds.createDimension("lon", lev["lon"].size)
        for name, vals, attrs in (
            ("depth", depth, {"units": "m", "positive": "down", "standard_name": "depth"}),
            ("lat", lev["lat"], {"units": "degrees_north", "standard_name": "latitude"}),
            ("lon", lev["lon"], {"units": "degrees_east", "standard_name": "longitude"}),
        ):
            v = ds.createVariable(name, "f8", (name,))
            v.setncatts(attrs)
            v[:] = vals
        for name, vals in fields.items():
            scale, offset = _PACK[name]
            v = ds.createVariable(
                name, "i2", ("depth", "lat", "lon"), zlib=True, complevel=9, shuffle=True,
                fill_value=_FILL, chunksizes=(1, lev["lat"].size, lev["lon"].size),
            )
            v.set_auto_maskandscale(False)
            std, units, long = meta[name]
            attrs = {"scale_factor": np.float64(scale), "add_offset": np.float64(offset),
                     "units": units, "long_name": long}
            if std:
                attrs["standard_name"] = std
            v.setncatts(attrs)
            v[:] = _pack(name, vals)
    return target


def _write_bathymetry(src: Path, out: Path, command: str) -> Path:
    import netCDF4

    try:
        with netCDF4.Dataset(src) as ds:
            rose = np.ma.filled(ds["ROSE"][:].astype(np.float64), np.nan)
            n_lon = ds["ETOPO05_X"].size
    except (OSError, IndexError, KeyError) as exc:
        raise InputFileError(
            src, f"cannot read ROSE ({exc})", f"reinstall {DEBIAN_PACKAGE}"
        ) from None
    if np.isnan(rose).any():
        raise InputFileError(src, "ROSE has missing values", f"reinstall {DEBIAN_PACKAGE}")
    b = BATHY_BLOCK
    # ETOPO5 nodes sit at lat -90 + j/12 (j = 0..2160) and lon i/12 (i = 0..4319; the stored
    # axis drifts to 359.92 by float rounding, but 4320 periodic nodes fix the step at 1/12).
    step = 360.0 / n_lon
    n_rows = (rose.shape[0] // b) * b  # drops the single +90 row
    blocks = rose[:n_rows].reshape(n_rows // b, b, n_lon // b, b).mean(axis=(1, 3))
    lat = -90.0 + (np.arange(n_rows // b) * b + (b - 1) / 2.0) * step
    lon = (np.arange(n_lon // b) * b + (b - 1) / 2.0) * step
    target = out / BATHYMETRY_FILE
    with atomic_output(target, overwrite=True) as tmp, netCDF4.Dataset(
        tmp, "w", format="NETCDF4"
    ) as ds:
        ds.setncatts(
            {
                "title": "World bathymetry and topography, 10 arcminute block means",
                **_common_attrs({src.name: src}, command),
                "history": (
                    f"ETOPO5 (Debian ferret-datasets) ROSE averaged over {b}x{b} blocks of "
                    "5-arcminute nodes (the +90 row dropped), rounded to whole metres"
                ),
                "geospatial_resolution": f"{b * 5} arcminutes",
            }
        )
        ds.createDimension("lat", lat.size)
        ds.createDimension("lon", lon.size)
        for name, vals, attrs in (
            ("lat", lat, {"units": "degrees_north", "standard_name": "latitude"}),
            ("lon", lon, {"units": "degrees_east", "standard_name": "longitude"}),
        ):
            v = ds.createVariable(name, "f8", (name,))
            v.setncatts(attrs)
            v[:] = vals
        v = ds.createVariable("elevation", "i2", ("lat", "lon"), zlib=True, complevel=9,
                              shuffle=True)
        v.setncatts({"units": "m", "positive": "up", "standard_name": "height_above_mean_sea_level",
                     "long_name": "surface elevation, block mean (ocean floor negative)"})
        v[:] = np.round(blocks).astype(np.int16)
    return target


def build(source: Path = DEFAULT_SOURCE, out: Path = DATA_DIR) -> list[Path]:
    """Build both packaged files from the Debian files in `source` into `out`.

    Parameters
    ----------
    source : path-like, default=DEFAULT_SOURCE
        Folder holding ``levitus_climatology.cdf``, ``coads_climatology.cdf`` and
        ``etopo5.cdf``.
    out : path-like, default=DATA_DIR
        Folder to write ``climatology_annual.nc`` and ``bathymetry.nc`` to (replaced).

    Returns
    -------
    list of Path
        The files written.

    Raises
    ------
    InputFileError
        If a source file is missing or unreadable.
    """
    source, out = Path(source), Path(out)
    for name in (LEVITUS_SOURCE, COADS_SOURCE, ETOPO_SOURCE):
        if not (source / name).is_file():
            raise InputFileError(
                source / name, "source file not found",
                f"install Debian's {DEBIAN_PACKAGE} or pass --source DIR",
            )
    out.mkdir(parents=True, exist_ok=True)
    args = ["--source", str(source)]
    if out.resolve() != DATA_DIR:
        args += ["--out", str(out)]
    command = "python -m qcflag.reference.build " + shlex.join(args)
    return [
        _write_climatology(source / LEVITUS_SOURCE, source / COADS_SOURCE, out, command),
        _write_bathymetry(source / ETOPO_SOURCE, out, command),
    ]


def main(argv: list[str] | None = None) -> int:
    """Command-line entry point; returns the exit code."""
    from qcflag.exceptions import QCFlagError

    parser = argparse.ArgumentParser(
        prog="python -m qcflag.reference.build",
        description="Build qcflag's packaged climatology and bathymetry from ferret-datasets.",
    )
    parser.add_argument("--source", type=Path, default=DEFAULT_SOURCE,
                        help=f"folder with the Debian files (default {DEFAULT_SOURCE})")
    parser.add_argument("--out", type=Path, default=DATA_DIR,
                        help="output folder (default: the package's data folder)")
    args = parser.parse_args(argv)
    try:
        paths = build(args.source, args.out)
    except QCFlagError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return 1
    for p in paths:
        print(f"{p}  {p.stat().st_size / 1e6:.2f} MB")
    return 0


if __name__ == "__main__":  # pragma: no cover
    raise SystemExit(main())
