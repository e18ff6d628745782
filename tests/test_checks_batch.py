"""Whole-batch properties: batch == profile by profile; vectorised == plain loop version.

The plain loop implementation (bench/loop_checks.py) is a second, independent write-up of
the same definitions, level by level; both must agree exactly on generated batches.
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from qcflag import ProfileBatch
from qcflag.checks import robust_z, second_difference
from qcflag.checks._ragged import (
    gather,
    moving_median_mad,
    neighbour_map,
    next_valid_index,
    next_values,
    prev_valid_index,
    prev_values,
    profile_levels,
    profile_reduce,
    sorting_network,
)
from qcflag.rules import RuleSet, load_rules, run_checks

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "bench"))
from loop_checks import own_steps, run_checks_loop

OWN = own_steps("standard")


@st.composite
def batches(draw, max_profiles=5, max_levels=30):
    n_prof = draw(st.integers(1, max_profiles))
    counts = draw(st.lists(st.integers(0, max_levels), min_size=n_prof, max_size=n_prof))
    n = sum(counts)
    # coarse values so that ties, repeats, spikes and inversions all occur
    temp = draw(st.lists(st.sampled_from([np.nan, -3.0, 2.0, 4.0, 4.0, 10.0, 10.5, 17.0,
                                          41.0]), min_size=n, max_size=n))
    sal = draw(st.lists(st.sampled_from([np.nan, 1.0, 34.5, 34.85, 35.0, 35.0, 36.0, 42.0]),
                        min_size=n, max_size=n))
    pres = draw(st.lists(st.sampled_from([np.nan, -6.0, -3.0, 0.0, 5.0, 10.0, 10.0, 490.0,
                                          500.0, 800.0, 1000.0]), min_size=n, max_size=n))
    pres = np.sort(np.asarray(pres, dtype=float)) if draw(st.booleans()) else np.asarray(pres)
    lat = draw(st.lists(st.sampled_from([38.0, 20.0, -30.0, np.nan]), min_size=n_prof,
                        max_size=n_prof))
    offsets = np.concatenate([[0], np.cumsum(counts)]).astype(np.int64)
    profiles = pd.DataFrame({
        "profile_id": [f"p{i}" for i in range(n_prof)], "cruise": "H",
        "time": pd.to_datetime(["2020-01-01"] * n_prof), "latitude": lat,
        "longitude": [5.0 if la == 38.0 else 40.0 for la in lat], "platform": "",
    })
    return ProfileBatch(offsets=offsets, pressure=pres, temperature=np.asarray(temp, float),
                        salinity=np.asarray(sal, float), profiles=profiles)


def _assert_tables_equal(a, b):
    assert list(a.results) == list(b.results)
    for key in a.results:
        ra, rb = a.results[key], b.results[key]
        assert np.array_equal(ra.grade, rb.grade), key
        assert np.array_equal(ra.statistic, rb.statistic, equal_nan=True), key


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(batches())
def test_batch_equals_profiles_one_by_one(batch):
    whole = run_checks(batch, OWN)
    parts = [run_checks(batch[i], OWN) for i in range(batch.n_profiles)]
    for key, res in whole.results.items():
        stat = np.concatenate([p.results[key].statistic for p in parts])
        grade = np.concatenate([p.results[key].grade for p in parts])
        assert np.array_equal(res.grade, grade), key
        assert np.array_equal(res.statistic, stat, equal_nan=True), key


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(batches())
def test_vectorised_equals_plain_loop(batch):
    _assert_tables_equal(run_checks(batch, OWN), run_checks_loop(batch, OWN))


def test_loop_equivalence_on_coastal_rules():
    rng = np.random.default_rng(7)
    sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "bench"))
    from _synthetic import synthetic_batch

    batch = synthetic_batch(6000, min_levels=5, max_levels=400, seed=int(rng.integers(99)))
    rs = own_steps("coastal")
    _assert_tables_equal(run_checks(batch, rs), run_checks_loop(batch, rs))


@pytest.mark.parametrize("share", [0.0, 0.3, 0.6, 0.95, 1.0])
def test_prev_next_valid_index_against_definition(share):
    # runs of invalid levels at profile tops and bottoms, empty profiles, all or none valid
    rng = np.random.default_rng(1)
    batch = next(iter([_random_batch(rng)]))
    valid = rng.random(batch.n_levels) < share
    prev, nxt = prev_valid_index(batch, valid), next_valid_index(batch, valid)
    for i in range(batch.n_levels):  # definition, written naively
        lo, hi = batch.offsets[batch.profile_index[i]], batch.offsets[batch.profile_index[i] + 1]
        before = [j for j in range(lo, i) if valid[j]]
        after = [j for j in range(i + 1, hi) if valid[j]]
        assert prev[i] == (before[-1] if before else -1)
        assert nxt[i] == (after[0] if after else -1)
    v = batch.temperature
    assert np.array_equal(prev_values(batch, v, valid), gather(v, prev), equal_nan=True)
    assert np.array_equal(next_values(batch, v, valid), gather(v, nxt), equal_nan=True)


@pytest.mark.parametrize("block", [1, 4, 32768])
def test_neighbour_map_sees_every_level_with_its_neighbours(block, monkeypatch):
    # blocks of adjacent levels, then the profile ends and gap neighbours redone
    import qcflag.checks._ragged as ragged

    monkeypatch.setattr(ragged, "_LEVEL_BLOCK", block)
    rng = np.random.default_rng(6)
    batch = _random_batch(rng)
    v = batch.temperature
    valid = rng.random(v.size) < 0.7
    got1, got3 = np.full(v.size, -1.0), np.full(v.size, -1.0)

    def record(levels, v1, v3):
        got1[levels], got3[levels] = v1, v3

    neighbour_map(batch, v, valid, record)
    assert np.array_equal(got1, gather(v, prev_valid_index(batch, valid)), equal_nan=True)
    assert np.array_equal(got3, gather(v, next_valid_index(batch, valid)), equal_nan=True)


def test_profile_levels_and_reductions_against_definition():
    rng = np.random.default_rng(3)
    batch = _random_batch(rng)
    chosen = np.array([5, 0, 11, 3])
    expect = [j for k in chosen for j in range(batch.offsets[k], batch.offsets[k + 1])]
    assert profile_levels(batch, chosen).tolist() == expect
    v = batch.temperature
    valid = rng.random(v.size) < 0.7
    lo, hi, count = profile_reduce(batch, v, valid, ("min", "max", "count"))
    for k in range(batch.n_profiles):
        vals = [v[j] for j in range(batch.offsets[k], batch.offsets[k + 1]) if valid[j]]
        assert count[k] == len(vals)
        if vals:
            assert (lo[k], hi[k]) == (min(vals), max(vals))
        else:
            assert np.isnan(lo[k]) and np.isnan(hi[k])
    assert np.array_equal(profile_reduce(batch, v, valid, "max"), hi, equal_nan=True)


@pytest.mark.parametrize("wires", range(2, 17))
def test_sorting_networks_sort_every_zero_one_input(wires):
    # 0-1 principle (Knuth, TAOCP vol. 3, 5.3.4, theorem Z): a comparator network that
    # sorts all 2**n inputs of zeros and ones sorts every input
    x = (np.arange(2 ** wires)[None, :] >> np.arange(wires)[:, None]) & 1
    for i, j in sorting_network(wires):
        assert i < j
        x[i], x[j] = np.minimum(x[i], x[j]), np.maximum(x[i], x[j])
    assert (np.diff(x, axis=0) >= 0).all()


def _random_batch(rng):
    counts = rng.integers(0, 15, size=12)
    n = int(counts.sum())
    offsets = np.concatenate([[0], np.cumsum(counts)]).astype(np.int64)
    profiles = pd.DataFrame({"profile_id": [str(i) for i in range(12)], "cruise": "R",
                             "time": pd.to_datetime(["2020-01-01"] * 12), "latitude": 0.0,
                             "longitude": 0.0, "platform": ""})
    return ProfileBatch(offsets=offsets, pressure=np.arange(n, dtype=float),
                        temperature=rng.normal(10, 1, n), salinity=rng.normal(35, 0.1, n),
                        profiles=profiles)


def test_moving_median_mad_against_numpy_median():
    rng = np.random.default_rng(2)
    batch = _random_batch(rng)
    v = batch.temperature.copy()
    valid = rng.random(v.size) < 0.8
    med, mad, count = moving_median_mad(batch, v, valid, 3)
    for i in range(v.size):
        lo = batch.offsets[batch.profile_index[i]]
        hi = batch.offsets[batch.profile_index[i] + 1]
        win = [v[j] for j in range(max(lo, i - 3), min(hi, i + 4)) if valid[j]]
        assert count[i] == len(win)
        if win:
            assert med[i] == np.median(win)  # numpy's median as the reference
            assert mad[i] == np.median(np.abs(np.asarray(win) - np.median(win)))
        else:
            assert np.isnan(med[i])


@pytest.mark.parametrize("half_window", [1, 2, 3, 5, 8, 15, 16])
def test_moving_median_mad_full_windows_against_numpy_median(half_window):
    # mostly full windows (the selection-network path; half_window 16 is past its limit
    # and takes np.partition), with ties from rounding and a few gaps
    rng = np.random.default_rng(half_window)
    counts = rng.integers(0, 90, size=8)
    n = int(counts.sum())
    offsets = np.concatenate([[0], np.cumsum(counts)]).astype(np.int64)
    profiles = pd.DataFrame({"profile_id": [str(i) for i in range(8)], "cruise": "R",
                             "time": pd.to_datetime(["2020-01-01"] * 8), "latitude": 0.0,
                             "longitude": 0.0, "platform": ""})
    v = np.round(rng.normal(10, 1, n), 1)
    batch = ProfileBatch(offsets=offsets, pressure=np.arange(n, dtype=float),
                         temperature=v, salinity=rng.normal(35, 0.1, n), profiles=profiles)
    valid = rng.random(n) < 0.97
    k = half_window
    med, mad, count = moving_median_mad(batch, v, valid, k)
    for i in range(n):
        lo = batch.offsets[batch.profile_index[i]]
        hi = batch.offsets[batch.profile_index[i] + 1]
        win = np.array([v[j] for j in range(max(lo, i - k), min(hi, i + k + 1)) if valid[j]])
        assert count[i] == win.size
        if win.size:
            assert med[i] == np.median(win)
            assert mad[i] == np.median(np.abs(win - np.median(win)))
        else:
            assert np.isnan(med[i]) and np.isnan(mad[i])


def test_shape_statistics_react_to_a_spike():
    rng = np.random.default_rng(4)
    batch = _random_batch(rng)
    t = np.linspace(20, 5, batch.n_levels)
    t[40] += 3.0
    b = ProfileBatch(offsets=batch.offsets, pressure=batch.pressure, temperature=t,
                     salinity=batch.salinity, profiles=batch.profiles)
    z = robust_z(b, variable="temperature").statistic
    d2 = second_difference(b, variable="temperature").statistic
    assert np.nanargmax(np.abs(z)) == 40 and z[40] > 5
    assert np.nanargmin(d2) == 40 and d2[40] == t[39] - 2 * t[40] + t[41]
    assert (robust_z(b, variable="temperature").grade == 0).all()


def test_vectorised_equals_plain_loop_on_a_faulty_batch():
    # many gaps, excluded levels, repeated values, reversals and unlocated profiles, so the
    # sparse corrections of the neighbour and run helpers are exercised at scale
    from _synthetic import synthetic_batch

    b = synthetic_batch(12_000, min_levels=1, max_levels=60, seed=3)
    rng = np.random.default_rng(5)
    p, t, s = b.pressure.copy(), b.temperature.copy(), b.salinity.copy()
    n = p.size
    for arr, share in ((p, 0.02), (t, 0.05), (s, 0.05)):
        arr[rng.random(n) < share] = np.nan
    hit = rng.random(n) < 0.02
    t[hit] += rng.normal(0, 8, hit.sum())
    hit = rng.random(n) < 0.01
    p[hit] -= rng.uniform(0, 100, hit.sum())
    for start in rng.choice(n - 30, size=40, replace=False):
        t[start:start + rng.integers(2, 30)] = t[start]
    t[rng.random(n) < 0.005] = 50.0
    prof = b.profiles.copy()
    prof.loc[prof.index[::37], "latitude"] = np.nan
    faulty = ProfileBatch(offsets=b.offsets, pressure=p, temperature=t, salinity=s,
                          profiles=prof)
    with np.errstate(invalid="ignore"):
        _assert_tables_equal(run_checks(faulty, OWN), run_checks_loop(faulty, OWN))


def test_rule_set_round_trip_through_text(tmp_path):
    rs = load_rules("standard")
    f = tmp_path / "copy.toml"
    f.write_text(rs.text)
    again = load_rules(f)
    assert isinstance(again, RuleSet) and again.checks == rs.checks
