"""Climatology check: standardized anomaly from the packaged climatology."""

from __future__ import annotations

import gsw
import numpy as np
import pandas as pd
import pytest
from _checks_support import read_argo_netcdf4

from qcflag.checks.climatology import DEFAULT_THRESHOLD, climatology_anomaly
from qcflag.profiles import ProfileBatch
from qcflag.reference import ClimatologyAtLevels, climatology_for, load_climatology


def _batch(lats, lons, pressures, temperature=None, salinity=None):
    counts = [len(p) for p in pressures]
    p = np.concatenate([np.asarray(x, float) for x in pressures])
    n = len(lats)
    return ProfileBatch(
        offsets=np.concatenate([[0], np.cumsum(counts)]).astype(np.int64),
        pressure=p,
        temperature=np.full(p.size, 10.0) if temperature is None else temperature,
        salinity=np.full(p.size, 35.0) if salinity is None else salinity,
        profiles=pd.DataFrame({
            "profile_id": [f"p{i}" for i in range(n)], "cruise": "c",
            "time": pd.to_datetime(["2015-06-01"] * n), "latitude": lats, "longitude": lons,
            "platform": "",
        }),
    )


def _reference(mean, sd, n):
    f = np.full(n, np.nan)
    return ClimatologyAtLevels(t_mean=np.full(n, mean), s_mean=np.full(n, mean),
                               t_sd=np.full(n, sd), s_sd=np.full(n, sd), depth=f)


def test_threshold_at_just_below_and_just_above():
    # QARTOD climatology test (qc-standards.md §4.3): outside the range -> 3, never 4
    mean, sd, thr = 10.0, 0.5, 4.0
    values = np.array([mean + thr * sd, mean + thr * sd - 1e-9, mean + thr * sd + 1e-9,
                       mean - thr * sd - 1e-9, mean, np.nan])
    b = _batch([0.0], [0.0], [np.arange(values.size) + 1.0], temperature=values)
    res = climatology_anomaly(b, variable="temperature", threshold=thr,
                              reference=_reference(mean, sd, values.size))
    np.testing.assert_array_equal(res.grade, [1, 1, 3, 3, 1, 0])
    assert res.statistic[0] == thr and res.statistic[3] < -thr
    assert np.isnan(res.statistic[5])
    assert res.grade.max() < 4


def test_statistic_is_the_standardized_anomaly_at_grid_nodes():
    ds = load_climatology()
    # a grid node in the open North Atlantic at standard depths 0..2000 m
    lat, lon = 30.5, -39.5
    col = ds.sel(lat=lat, lon=lon + 360)
    depth = ds.depth.values[:17]
    p = gsw.p_from_z(-depth, lat)
    k = np.array([-6.0, -2.0, 0.0, 1.0, 3.0, 5.5, 7.0, -5.5, 0.5, 2.0, -1.0, 6.0, 0.0, 1.5,
                  -3.0, 4.0, -7.0])
    t = col.t_mean.values[:17] + k * col.t_sd.values[:17]
    s = col.s_mean.values[:17] - k * col.s_sd.values[:17]
    b = _batch([lat], [lon], [p], temperature=t, salinity=s)
    rt = climatology_anomaly(b, variable="temperature")
    rs = climatology_anomaly(b, variable="salinity")
    np.testing.assert_allclose(rt.statistic, k, atol=1e-4)
    np.testing.assert_allclose(rs.statistic, -k, atol=1e-4)
    want = np.where(np.abs(k) > DEFAULT_THRESHOLD, 3, 1)
    np.testing.assert_array_equal(rt.grade, want)
    np.testing.assert_array_equal(rs.grade, want)


def test_not_applicable_on_land_and_below_climatology():
    # the Sahara (23N 13E) is land (common knowledge); 6000 m is below the deepest level
    b = _batch([23.0, 30.5], [13.0, -39.5], [[10.0, 20.0], [100.0, 6200.0]])
    res = climatology_anomaly(b, variable="salinity")
    np.testing.assert_array_equal(res.grade[[0, 1, 3]], [0, 0, 0])
    assert np.isnan(res.statistic[[0, 1, 3]]).all()
    assert res.grade[2] in (1, 3) and np.isfinite(res.statistic[2])  # open ocean, 100 dbar


def test_shared_reference_equals_own_interpolation():
    b = _batch([10.0, -45.0], [-30.0, 150.0], [[5.0, 300.0, 1500.0], [10.0, 800.0]])
    ref = climatology_for(b)
    for v in ("temperature", "salinity"):
        a = climatology_anomaly(b, variable=v)
        c = climatology_anomaly(b, variable=v, reference=ref)
        np.testing.assert_array_equal(a.statistic, c.statistic)


def test_bad_arguments():
    b = _batch([0.0], [0.0], [[1.0]])
    with pytest.raises(ValueError, match="variable"):
        climatology_anomaly(b, variable="pressure")
    with pytest.raises(ValueError, match="threshold"):
        climatology_anomaly(b, variable="salinity", threshold=0.0)


def test_batch_equals_profiles_one_by_one():
    rng = np.random.default_rng(6)
    lats, lons = rng.uniform(-60, 60, 12), rng.uniform(-180, 180, 12)
    pres = [np.sort(rng.uniform(0, 2500, rng.integers(1, 30))) for _ in range(12)]
    n = sum(len(p) for p in pres)
    b = _batch(lats, lons, pres, temperature=rng.uniform(0, 30, n),
               salinity=rng.uniform(33, 37, n))
    for v in ("temperature", "salinity"):
        whole = climatology_anomaly(b, variable=v)
        parts = [climatology_anomaly(b[i], variable=v) for i in range(b.n_profiles)]
        np.testing.assert_array_equal(whole.statistic,
                                      np.concatenate([p.statistic for p in parts]))
        np.testing.assert_array_equal(whole.grade, np.concatenate([p.grade for p in parts]))


def test_real_argo_profiles(argo_files):
    # real, expert-checked delayed-mode/real-time Argo profiles (../shared/data/argo)
    b = read_argo_netcdf4(argo_files)
    for v in ("temperature", "salinity"):
        res = climatology_anomaly(b, variable=v)
        have = ~np.isnan(b.values(v))
        assert (res.grade[have] == 1).all(), v  # no verdict >= 3, climatology everywhere
        z = np.abs(res.statistic[have])
        assert z.max() < 4.0 and np.median(z) < 2.0  # modest anomalies
    # a fault of 10 degC / 3 PSS-78 injected at every 10th level below 200 dbar is caught
    # (nearer the surface the seasonal term of the variability estimate is several degC)
    hit = (np.arange(b.n_levels) % 10 == 5) & (b.pressure > 200)
    t, s = b.temperature.copy(), b.salinity.copy()
    t[hit] += 10.0
    s[hit] -= 3.0
    bad = ProfileBatch(b.offsets, b.pressure, t, s, b.profiles)
    assert (climatology_anomaly(bad, variable="temperature").grade[hit] == 3).all()
    assert (climatology_anomaly(bad, variable="salinity").grade[hit] == 3).all()
