"""Position, date, on-land and sea-floor checks (Argo real-time tests 2, 3, 4)."""

from __future__ import annotations

import gsw
import numpy as np
import pandas as pd
import pytest
from _checks_support import read_argo_netcdf4

from qcflag.checks.position import below_seafloor, date, on_land, position
from qcflag.profiles import ProfileBatch
from qcflag.reference import seafloor_depth

VARS = ("temperature", "salinity", "pressure")


def _batch(lats, lons, times=None, pressures=None):
    """One profile per position; `pressures` is a list of per-profile pressure lists."""
    n = len(lats)
    if pressures is None:
        pressures = [[5.0, 100.0]] * n
    if times is None:
        times = ["2015-06-01"] * n
    counts = [len(p) for p in pressures]
    p = np.concatenate([np.asarray(x, float) for x in pressures])
    return ProfileBatch(
        offsets=np.concatenate([[0], np.cumsum(counts)]).astype(np.int64),
        pressure=p, temperature=np.full(p.size, 10.0), salinity=np.full(p.size, 35.0),
        profiles=pd.DataFrame({
            "profile_id": [f"p{i}" for i in range(n)], "cruise": "c",
            "time": pd.to_datetime(times, format="ISO8601"), "latitude": lats, "longitude": lons,
            "platform": "",
        }),
    )


def _profile_grades(result, batch):
    """Grade of the first level of each profile, checking all levels agree."""
    g = result.grade
    first = g[batch.offsets[:-1]]
    np.testing.assert_array_equal(g, first[batch.profile_index])
    return first


def test_position_limits():
    # Argo test 3 (qc-standards.md §1.3): -90 <= lat <= 90, -180 <= lon <= 180, else 4
    lats = [90.0, -90.0, 90.0001, -90.0001, 0.0, 0.0, 0.0, 0.0, np.nan, 0.0]
    lons = [0.0, 0.0, 0.0, 0.0, 180.0, -180.0, 180.0001, -180.0001, 0.0, np.nan]
    b = _batch(lats, lons)
    res = position(b)
    assert set(res) == set(VARS)
    want = [1, 1, 4, 4, 1, 1, 4, 4, 4, 4]
    for v in VARS:
        np.testing.assert_array_equal(_profile_grades(res[v], b), want)
    stat = res["temperature"].statistic[b.offsets[:-1]]
    assert stat[0] == 0.0 and stat[2] == pytest.approx(0.0001) and np.isnan(stat[8])


def test_missing_value_levels_get_no_grade():
    b = _batch([95.0], [0.0], pressures=[[5.0, 10.0]])
    t = b.temperature.copy()
    t[1] = np.nan
    b = ProfileBatch(b.offsets, b.pressure, t, b.salinity, b.profiles)
    res = position(b)
    np.testing.assert_array_equal(res["temperature"].grade, [4, 0])
    np.testing.assert_array_equal(res["salinity"].grade, [4, 4])


def test_date_limits():
    # Argo test 2 (qc-standards.md §1.3): JULD after 1 Jan 1997 and not in the future
    times = ["1997-01-01T00:00:00", "1996-12-31T23:59:59", "2020-05-05", "2030-01-02",
             None]
    b = _batch([0.0] * 5, [0.0] * 5, times=times)
    res = date(b, now="2030-01-01")
    np.testing.assert_array_equal(_profile_grades(res["salinity"], b), [1, 4, 1, 4, 4])
    stat = res["pressure"].statistic[b.offsets[:-1]]
    assert stat[0] == 0.0 and stat[1] == pytest.approx(1 / 86400) and stat[3] == 1.0
    assert np.isnan(stat[4])
    # the default "now" is the current time: a date next year is impossible
    nxt = pd.Timestamp.now() + pd.Timedelta(days=366)
    b2 = _batch([0.0, 0.0], [0.0, 0.0], times=["2001-01-01", nxt.isoformat()])
    np.testing.assert_array_equal(_profile_grades(date(b2)["temperature"], b2), [1, 4])
    # a historical CTD archive lowers the earliest date
    b3 = _batch([0.0], [0.0], times=["1965-03-01"])
    assert date(b3)["temperature"].grade[0] == 4
    assert date(b3, earliest="1900-01-01")["temperature"].grade[0] == 1


def test_on_land_known_places():
    # common knowledge: the Sahara (23N 13E) and Tibet (32N 90E) are land; the middle of the
    # North Atlantic (40N 35W) and central Pacific (15N 150W) are deep ocean
    b = _batch([23.0, 32.0, 40.0, 15.0, 95.0], [13.0, 90.0, -35.0, -150.0, 0.0])
    res = on_land(b)
    np.testing.assert_array_equal(_profile_grades(res["temperature"], b), [4, 4, 1, 1, 0])
    stat = res["temperature"].statistic[b.offsets[:-1]]
    assert stat[0] < 0 and stat[2] > 3000 and np.isnan(stat[4])


def test_on_land_methods_on_a_coast():
    # find a position where the bilinear sea floor is land but one corner node is ocean
    rng = np.random.default_rng(5)
    lat, lon = rng.uniform(-60, 60, 20000), rng.uniform(-180, 180, 20000)
    bil = seafloor_depth(lat, lon)
    deep = seafloor_depth(lat, lon, method="deepest")
    k = np.flatnonzero((bil < 0) & (deep > 0))[0]
    b = _batch([lat[k]], [lon[k]])
    assert on_land(b)["pressure"].grade[0] == 1  # default: generous on a coarse grid
    assert on_land(b, method="bilinear")["pressure"].grade[0] == 4
    # threshold: min_depth at / just above the sea-floor depth
    d = deep[k]
    assert on_land(b, min_depth=d)["pressure"].grade[0] == 1
    assert on_land(b, min_depth=d + 0.01)["pressure"].grade[0] == 4


def test_below_seafloor_tolerance():
    lat, lon = 40.0, -35.0
    floor = float(seafloor_depth(lat, lon, method="deepest"))
    tol = 200.0
    depths = [floor, floor + tol - 1.0, floor + tol + 1.0]
    p = gsw.p_from_z(-np.array(depths), lat)
    b = _batch([lat], [lon], pressures=[p])
    res = below_seafloor(b, tolerance=tol)
    np.testing.assert_array_equal(res["pressure"].grade, [1, 1, 3])
    np.testing.assert_allclose(res["pressure"].statistic, np.array(depths) - floor, atol=1e-6)
    assert set(res) == set(VARS)
    # impossible position or missing pressure: not applicable
    b2 = _batch([95.0, 0.0], [0.0, -150.0], pressures=[[10.0], [np.nan]])
    g = below_seafloor(b2)["temperature"].grade
    np.testing.assert_array_equal(g, [0, 0])


def test_batch_equals_profiles_one_by_one():
    lats = [23.0, 40.0, 95.0, -60.0, 10.0]
    lons = [13.0, -35.0, 0.0, 170.0, 400.0]
    times = ["2010-01-01", "1990-01-01", "2015-01-01", None, "2012-01-01"]
    pres = [[5.0, 50.0], [10.0, 3000.0, 7000.0], [1.0], [2.0, 4.0, 8.0], [100.0]]
    b = _batch(lats, lons, times, pres)
    fixed_date = lambda x: date(x, now="2024-01-01")  # noqa: E731 (same "now" for all)
    for fn in (position, fixed_date, on_land, below_seafloor):
        whole = fn(b)
        parts = [fn(b[i]) for i in range(b.n_profiles)]
        for v in VARS:
            np.testing.assert_array_equal(
                whole[v].grade, np.concatenate([p[v].grade for p in parts]))
            np.testing.assert_array_equal(
                whole[v].statistic, np.concatenate([p[v].statistic for p in parts]))


def test_real_argo_profiles_pass(argo_files):
    # real, expert-checked Argo profiles (../shared/data/argo): no position/date verdict
    b = read_argo_netcdf4(argo_files)
    for fn in (position, date, on_land, below_seafloor):
        for v, r in fn(b).items():
            assert r.grade.max() <= 1, (fn.__name__, v)
            assert (r.grade[~np.isnan(b.values(v))] == 1).all()
