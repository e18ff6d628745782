"""Packaged reference fields: against the Debian originals, interpolation, known places."""

from __future__ import annotations

import hashlib
from pathlib import Path

import gsw
import numpy as np
import pytest

from qcflag.exceptions import InputFileError
from qcflag.reference import (
    BATHYMETRY_PATH,
    CLIMATOLOGY_PATH,
    climatology_at,
    climatology_columns,
    load_bathymetry,
    load_climatology,
    seafloor_depth,
)
from qcflag.reference import build as builder

# Debian's ferret-datasets package (public-domain Levitus climatology, COADS, ETOPO5)
DEBIAN = Path("/usr/share/ferret-vis/data")
needs_debian = pytest.mark.skipif(
    not (DEBIAN / "levitus_climatology.cdf").is_file(),
    reason="Debian ferret-datasets is not installed (apt-get install ferret-datasets)",
)
PACK_STEP = 0.001  # int16 packing step of the climatology (qcflag.reference.build._PACK)


@pytest.fixture(scope="module")
def levitus():
    netCDF4 = pytest.importorskip("netCDF4")
    with netCDF4.Dataset(DEBIAN / "levitus_climatology.cdf") as ds:
        return {
            "x": np.asarray(ds["XAXLEVITR"][:]),
            "y": np.asarray(ds["YAXLEVITR"][:]),
            "z": np.asarray(ds["ZAXLEVITR"][:]),
            "t": np.ma.filled(ds["TEMP"][:].astype(float), np.nan),
            "s": np.ma.filled(ds["SALT"][:].astype(float), np.nan),
        }


def _random_nodes(n, seed=0):
    rng = np.random.default_rng(seed)
    return rng.integers(0, 20, n), rng.integers(0, 180, n), rng.integers(0, 360, n)


# ------------------------------------------------------------------------ the files
def test_packaged_files_small_enough():
    total = CLIMATOLOGY_PATH.stat().st_size + BATHYMETRY_PATH.stat().st_size
    assert total < 8_000_000  # issue 3: under 8 MB together


def test_provenance_attributes():
    for ds in (load_climatology(), load_bathymetry()):
        for key in ("source_package", "source_files", "source_sha256", "build_date",
                    "build_command"):
            assert ds.attrs.get(key), key
        assert "ferret-datasets" in ds.attrs["source_package"]
        assert ds.attrs["build_command"].startswith("python -m qcflag.reference.build")
    method = load_climatology().attrs["variability_method"]
    assert "ESTIMATE" in method and "not a measured" in method


@needs_debian
def test_provenance_hashes_match_debian_files():
    for ds in (load_climatology(), load_bathymetry()):
        for item in ds.attrs["source_sha256"].split(", "):
            name, digest = item.split("=")
            assert hashlib.sha256((DEBIAN / name).read_bytes()).hexdigest() == digest


def test_loaded_climatology_layout():
    ds = load_climatology()
    assert set(ds.data_vars) >= {"t_mean", "s_mean", "t_sd", "s_sd"}
    assert ds.sizes == {"depth": 20, "lat": 180, "lon": 360}
    assert ds.lon.values[0] == 0.5 and ds.lon.values[-1] == 359.5
    # the estimate is at least its floor wherever the mean exists, and only there
    for sd, mean, floor in (("t_sd", "t_mean", 0.5), ("s_sd", "s_mean", 0.1)):
        assert (np.isnan(ds[sd].values) == np.isnan(ds[mean].values)).all()
        assert np.nanmin(ds[sd].values) >= floor - PACK_STEP


# ------------------------------------------------------ packaged vs Debian originals
@needs_debian
def test_climatology_means_equal_debian_at_random_nodes(levitus):
    k, j, i = _random_nodes(200)
    ds = load_climatology()
    src_i = np.flatnonzero(np.isclose(levitus["x"] % 360, 0.5))[0]  # source column of 0.5E
    orig_i = (i + src_i) % 360
    assert np.allclose(levitus["x"][orig_i] % 360, ds.lon.values[i])
    assert np.allclose(levitus["y"][j], ds.lat.values[j])
    assert np.allclose(levitus["z"][k], ds.depth.values[k])
    for var, src in (("t_mean", "t"), ("s_mean", "s")):
        packed = ds[var].values[k, j, i]
        orig = levitus[src][k, j, orig_i]
        assert (np.isnan(packed) == np.isnan(orig)).all()
        ok = ~np.isnan(orig)
        assert ok.sum() > 50
        np.testing.assert_allclose(packed[ok], orig[ok], rtol=0, atol=PACK_STEP / 2 + 1e-5)


def _sd_by_hand(field, z, k, j, i, floor, season=0.0):
    """The documented formula at one node, written plainly (independent of build.py)."""
    x = field[k, j, i]
    neigh = [field[k, jj, ii % 360] for jj in (j - 1, j, j + 1) if 0 <= jj < 180
             for ii in (i - 1, i, i + 1)]
    neigh = np.array([v for v in neigh if not np.isnan(v)])
    spread = neigh.std()
    slopes = []
    if k > 0 and not np.isnan(field[k - 1, j, i]):
        slopes.append(abs(x - field[k - 1, j, i]) / (z[k] - z[k - 1]))
    if k < 19 and not np.isnan(field[k + 1, j, i]):
        slopes.append(abs(field[k + 1, j, i] - x) / (z[k + 1] - z[k]))
    grad = max(slopes) if slopes else 0.0
    seasonal = season * np.exp(-z[k] / 100.0)
    return np.sqrt(floor**2 + spread**2 + (15.0 * grad) ** 2 + seasonal**2)


@needs_debian
def test_variability_estimate_matches_documented_formula(levitus):
    netCDF4 = pytest.importorskip("netCDF4")
    with netCDF4.Dataset(DEBIAN / "coads_climatology.cdf") as c:
        cx, cy = np.asarray(c["COADSX"][:]), np.asarray(c["COADSY"][:])
        sst = np.ma.filled(c["SST"][:].astype(float), np.nan)
    ds = load_climatology()
    order = np.argsort(levitus["x"] % 360)
    t, s = levitus["t"][:, :, order], levitus["s"][:, :, order]
    k, j, i = _random_nodes(300, seed=1)
    checked = 0
    for kk, jj, ii in zip(k, j, i, strict=True):
        if np.isnan(t[kk, jj, ii]):
            continue
        lon, lat = ds.lon.values[ii], ds.lat.values[jj]
        ci = int(np.argmin(np.abs(((cx % 360) - lon + 180) % 360 - 180)))
        cj = int(np.argmin(np.abs(cy - lat)))
        season = np.std(sst[:, cj, ci])
        if np.isnan(season):  # the documented gap filling is exercised by the build only
            continue
        want_t = _sd_by_hand(t, levitus["z"], kk, jj, ii, 0.5, season)
        want_s = _sd_by_hand(s, levitus["z"], kk, jj, ii, 0.1)
        assert ds.t_sd.values[kk, jj, ii] == pytest.approx(want_t, abs=PACK_STEP)
        assert ds.s_sd.values[kk, jj, ii] == pytest.approx(want_s, abs=PACK_STEP)
        checked += 1
    assert checked > 50


@needs_debian
def test_bathymetry_equals_debian_block_means():
    netCDF4 = pytest.importorskip("netCDF4")
    with netCDF4.Dataset(DEBIAN / "etopo5.cdf") as e:
        rose = np.asarray(e["ROSE"][:], dtype=float)
    b = load_bathymetry()
    rng = np.random.default_rng(2)
    j = rng.integers(0, b.sizes["lat"], 200)
    i = rng.integers(0, b.sizes["lon"], 200)
    want = np.array([rose[2 * jj : 2 * jj + 2, 2 * ii : 2 * ii + 2].mean()
                     for jj, ii in zip(j, i, strict=True)])
    np.testing.assert_allclose(b.elevation.values[j, i], want, atol=0.5)
    # ETOPO5 nodes are at lat -90 + n/12, lon n/12: block centres sit between them
    np.testing.assert_allclose(b.lat.values[j], -90 + (2 * j + 0.5) / 12, atol=1e-9)
    np.testing.assert_allclose(b.lon.values[i], (2 * i + 0.5) / 12, atol=1e-9)


@needs_debian
def test_build_reproduces_packaged_files(tmp_path):
    written = builder.build(DEBIAN, tmp_path)
    assert [p.name for p in written] == [CLIMATOLOGY_PATH.name, BATHYMETRY_PATH.name]
    import xarray as xr

    for new, old in ((written[0], load_climatology()), (written[1], load_bathymetry())):
        with xr.open_dataset(new) as ds:
            xr.testing.assert_equal(ds.load(), old)


def test_build_missing_source_names_file_and_fix(tmp_path, capsys):
    with pytest.raises(InputFileError, match=r"levitus_climatology\.cdf.*ferret-datasets"):
        builder.build(tmp_path / "nowhere", tmp_path / "out")
    assert builder.main(["--source", str(tmp_path), "--out", str(tmp_path / "o")]) == 1
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "--source" in err


# ------------------------------------------------------------------ interpolation
def _pressure_at_depth(depth, lat):
    return gsw.p_from_z(-np.asarray(depth, dtype=float), lat)


def test_interpolation_at_nodes_reproduces_node_values():
    ds = load_climatology()
    k, j, i = _random_nodes(200, seed=3)
    lat, lon, depth = ds.lat.values[j], ds.lon.values[i], ds.depth.values[k]
    # longitudes given in the -180..180 convention exercise the wrap as well
    lon_pm = np.where(lon > 180, lon - 360, lon)
    got = climatology_at(lat, lon_pm, _pressure_at_depth(depth, lat))
    for name in ("t_mean", "s_mean", "t_sd", "s_sd"):
        want = ds[name].values[k, j, i]
        # the loader keeps the grid in float32: agreement to 1e-5, far below the packing step
        np.testing.assert_allclose(getattr(got, name), want, rtol=0, atol=1e-5)
        assert (np.isnan(getattr(got, name)) == np.isnan(want)).all()


def _full_column(ds):
    """A grid column with data at all 20 standard depths (deep open ocean)."""
    full = ~np.isnan(ds.t_mean.values).any(axis=0)
    jj, ii = np.argwhere(full)[len(np.argwhere(full)) // 2]
    return float(ds.lat.values[jj]), float(ds.lon.values[ii])


def test_linear_in_depth_between_standard_levels():
    ds = load_climatology()
    lat, lon = _full_column(ds)
    col = ds.t_mean.sel(lat=lat, lon=lon).values
    mid = (ds.depth.values[:-1] + ds.depth.values[1:]) / 2
    got = climatology_at(lat, lon, _pressure_at_depth(mid, lat)).t_mean
    np.testing.assert_allclose(got, (col[:-1] + col[1:]) / 2, atol=1e-5)
    # a column that ends at 3000 m: nothing below it, values down to it
    short = np.isnan(ds.t_mean.values[18]) & ~np.isnan(ds.t_mean.values[17])
    jj, ii = np.argwhere(short)[0]
    la, lo = float(ds.lat.values[jj]), float(ds.lon.values[ii])
    got = climatology_at(la, lo, _pressure_at_depth([2999.0, 3000.0, 3001.0], la)).t_mean
    assert not np.isnan(got[:2]).any() and np.isnan(got[2])


def test_bilinear_renormalises_over_ocean_corners():
    ds = load_climatology()
    t0 = ds.t_mean.values[0]
    # find 2x2 cells with exactly one land corner, and with none
    quad = np.stack([t0[:-1, :-1], t0[:-1, 1:], t0[1:, :-1], t0[1:, 1:]])
    n_land = np.isnan(quad).sum(axis=0)
    for want_land in (0, 1):
        jj, ii = np.argwhere(n_land == want_land)[7]
        lat = ds.lat.values[jj] + 0.5
        lon = ds.lon.values[ii] + 0.5
        got = climatology_columns(lat, lon).t_mean[0, 0]
        assert got == pytest.approx(np.nanmean(quad[:, jj, ii]), abs=1e-6)


def test_longitude_wrap_between_last_and_first_column():
    ds = load_climatology()
    j = int(np.argmin(np.abs(ds.lat.values - (-40.5))))  # Southern Ocean, open water all round
    a, b = ds.t_mean.values[0, j, -1], ds.t_mean.values[0, j, 0]
    assert not np.isnan(a) and not np.isnan(b)
    cols = climatology_columns([-40.5, -40.5, -40.5], [0.0, 360.0, -360.0]).t_mean[:, 0]
    np.testing.assert_allclose(cols, (a + b) / 2, atol=1e-6)
    near = climatology_columns([-40.5, -40.5], [359.9, -0.1]).t_mean[:, 0]
    assert near[0] == pytest.approx(near[1], abs=1e-9)


def test_no_climatology_on_land_or_below_the_deepest_level():
    # the Sahara (23N 13E) is land: common knowledge
    got = climatology_at(23.0, 13.0, [0.0, 100.0])
    assert np.isnan(got.t_mean).all() and np.isnan(got.s_sd).all()
    # deeper than 5000 m (the deepest standard depth) has no climatology
    lat, lon = _full_column(load_climatology())
    got = climatology_at(lat, lon, _pressure_at_depth([4999.0, 5001.0], lat))
    assert not np.isnan(got.t_mean[0]) and np.isnan(got.t_mean[1])
    # impossible positions have none either
    assert np.isnan(climatology_at([np.nan, 95.0], [0.0, 0.0], [10.0, 10.0]).t_mean).all()


def test_profile_index_form_equals_per_level_form():
    lat = np.array([10.2, -33.7, 51.1])
    lon = np.array([-140.3, 15.9, -20.4])
    p = np.array([5.0, 500.0, 12.0, 900.0, 2000.0, 50.0])
    idx = np.array([0, 0, 1, 1, 1, 2])
    a = climatology_at(lat, lon, p, idx)
    b = climatology_at(lat[idx], lon[idx], p)
    for name in ("t_mean", "s_mean", "t_sd", "s_sd", "depth"):
        np.testing.assert_array_equal(getattr(a, name), getattr(b, name))
    with pytest.raises(ValueError, match="profile_index"):
        climatology_at(lat, lon, p, idx[:-1])


def test_ten_thousand_positions_in_one_call():
    rng = np.random.default_rng(4)
    n = 10_000
    lat, lon = rng.uniform(-85, 85, n), rng.uniform(-180, 180, n)
    cols = climatology_columns(lat, lon)
    assert cols.t_mean.shape == (n, 20)
    sample = rng.choice(n, 40, replace=False)
    for s in sample:  # one at a time must agree with the vectorised call
        one = climatology_columns(lat[s], lon[s])
        np.testing.assert_array_equal(one.t_mean[0], cols.t_mean[s])
    depth = seafloor_depth(lat, lon)
    assert depth.shape == (n,)
    np.testing.assert_array_equal(seafloor_depth(lat[sample], lon[sample]), depth[sample])
    # land from the bathymetry and "no climatology" mostly coincide
    land = depth < -100
    assert np.isnan(cols.t_mean[land, 0]).mean() > 0.9


# ------------------------------------------------------------- known places
def test_known_places():
    # common knowledge: the Sahara (23N 13E) and the Tibetan plateau (32N 90E, > 4000 m high)
    # are land; the middle of the North Atlantic (40N 35W) and the central Pacific (15N
    # 150W) are more than 3000 m deep
    d = seafloor_depth([23.0, 32.0, 40.0, 15.0], [13.0, 90.0, -35.0, -150.0])
    assert d[0] < 0 and d[1] < -4000
    assert d[2] > 3000 and d[3] > 3000
    # the same position in either longitude convention gives the same depth
    assert seafloor_depth(40.0, 325.0) == pytest.approx(d[2])
    # common knowledge: the western Pacific warm pool (0N 160E) is warmer than 28 degC at
    # the surface; water at 4000 m is colder than 3 degC in the open ocean, while the
    # Ionian Sea (36N 18E) is warmer than 12 degC at 2500 m
    warm = climatology_at(0.0, 160.0, 0.0)
    assert warm.t_mean[0] > 28.0
    deep = climatology_at([40.0, 15.0, -35.0, 36.0], [-35.0, -150.0, 100.0, 18.0],
                          _pressure_at_depth([4000.0, 4000.0, 4000.0, 2500.0], 0.0)).t_mean
    assert (deep[:3] < 3.0).all() and deep[3] > 12.0


def test_seafloor_depth_methods_and_nodes():
    b = load_bathymetry()
    j, i = 500, 1500
    lat, lon = b.lat.values[j], b.lon.values[i]
    node = -float(b.elevation.values[j, i])
    assert seafloor_depth(lat, lon) == pytest.approx(node)
    assert seafloor_depth(lat, lon, method="nearest") == pytest.approx(node)
    lat_mid, lon_mid = lat + 1 / 12, lon + 1 / 12
    corners = -b.elevation.values[j : j + 2, i : i + 2].astype(float)
    assert seafloor_depth(lat_mid, lon_mid) == pytest.approx(corners.mean())
    assert seafloor_depth(lat_mid, lon_mid, method="deepest") == pytest.approx(corners.max())
    assert np.isnan(seafloor_depth(np.nan, 0.0))
    with pytest.raises(ValueError, match="method"):
        seafloor_depth(0.0, 0.0, method="cubic")
