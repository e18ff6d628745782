"""Tests of the invented survey programme (qcflag.simulate).

The physical checks below compare the simulated data against things we did not write:
TEOS-10 (gsw) densities, the Argo real-time test definitions and published limits (Argo QC
manual, DOI 10.13155/33951, tests 6, 8, 9, 12, 14, taken via ../shared/reference/
qc-standards.md section 1.3; values marked there as from memory) and the packaged ETOPO5
bathymetry.
"""

from __future__ import annotations

import hashlib
import json
from collections import Counter
from pathlib import Path

import gsw
import numpy as np
import pytest
from typer.testing import CliRunner

from qcflag.exceptions import OutputExistsError, QCFlagError
from qcflag.schemes import decode
from qcflag.simulate import (
    FAULT_KINDS,
    TRUTH_COLUMNS,
    SimulationConfig,
    demo_config,
    simulate_archive,
    write_scenario,
)

ROOT = Path(__file__).resolve().parents[1]
VARS = ("temperature", "salinity", "pressure")
# small, fast archive shapes: short casts, several cruises
SMALL = {"casts_per_cruise": 10, "floats_per_cruise": 1, "cycles_per_float": 4,
         "max_cast_pressure": 400.0, "float_max_pressure": 1000.0}
NO_FAULTS = dict.fromkeys(FAULT_KINDS, 0.0)


@pytest.fixture(scope="module")
def default_run():
    return simulate_archive(6, seed=0)


@pytest.fixture(scope="module")
def clean_run():
    return simulate_archive(6, seed=5, config=SimulationConfig(fault_rates=NO_FAULTS,
                                                               casts_per_cruise=12))


def _pairs(b):
    """Indices (a, a + 1) of vertically adjacent levels within profiles."""
    a = np.flatnonzero(~b.last_level)
    return a, a + 1


def _density_drop(b, a, c):
    """Potential-density decrease from a to c, both referenced to the mid-point pressure
    (Argo test 14 convention), TEOS-10."""
    lat, lon, p = b.per_level("latitude"), b.per_level("longitude"), b.pressure
    sa = gsw.SA_from_SP(b.salinity, p, lon, lat)
    ct = gsw.CT_from_t(sa, b.temperature, p)
    pref = 0.5 * (p[a] + p[c])
    return gsw.rho(sa[a], ct[a], pref) - gsw.rho(sa[c], ct[c], pref)


def _argo_spike(b, x):
    """Argo test 9 statistic |V2 - (V3+V1)/2| - |(V3 - V1)/2| at interior levels (NaN else)."""
    out = np.full(x.size, np.nan)
    i = np.flatnonzero(~b.first_level & ~b.last_level)
    out[i] = np.abs(x[i] - 0.5 * (x[i - 1] + x[i + 1])) - np.abs(0.5 * (x[i + 1] - x[i - 1]))
    return out


# ------------------------------------------------------------------------- contract / shape
def test_contract_columns_and_types(default_run):
    b = default_run
    assert b.scheme == "argo"
    assert sorted(b.flags) == sorted(VARS)
    for col in ("profile_id", "cruise", "time", "latitude", "longitude", "platform",
                "operator", "instrument", "station"):
        assert col in b.profiles.columns
    assert set(b.profiles["instrument"]) == {"ctd", "float"}
    assert b.profiles["profile_id"].is_unique
    assert list(b.extra.columns) == list(TRUTH_COLUMNS)
    for v in VARS:
        g = b.extra[f"truth_{v}_grade"].to_numpy()
        assert set(np.unique(g)) <= {0, 1, 2, 3, 4}
    assert b.extra["truth_manual_error"].dtype == bool
    # one operator per cruise
    assert (b.profiles.groupby("cruise")["operator"].nunique() == 1).all()
    assert b.profiles["cruise"].nunique() == 6
    assert b.attrs["simulation"]["invented"] is True


def test_resolution_ctd_and_float(default_run):
    b = default_run
    inst = b.per_level("instrument")
    a, c = _pairs(b)
    dp = b.pressure[c] - b.pressure[a]
    ok = b.extra["truth_pressure_grade"].to_numpy()[c] == 1
    ctd = (inst[a] == "ctd") & ok & (b.extra["truth_pressure_grade"].to_numpy()[a] == 1)
    assert np.allclose(dp[ctd], 1.0)
    fl = inst[a] == "float"
    assert dp[fl].min() > 1.0 and dp[fl].max() < 60.0
    # floats: ~2 dbar near the surface, coarse at depth, to ~2000 dbar
    deep = fl & (b.pressure[a] > 1000)
    assert np.median(dp[fl & (b.pressure[a] < 150)]) < 3.0 and np.median(dp[deep]) > 30.0
    pmax = np.maximum.reduceat(b.pressure, b.offsets[:-1])
    is_float = b.profiles["instrument"].to_numpy() == "float"
    assert np.all(np.abs(pmax[is_float] - 2000.0) < 60.0)


def test_determinism_and_seed_dependence():
    cfg = SimulationConfig(**SMALL)
    a = simulate_archive(2, seed=11, config=cfg)
    b = simulate_archive(2, seed=11, config=cfg)
    c = simulate_archive(2, seed=12, config=cfg)
    assert np.array_equal(a.temperature, b.temperature, equal_nan=True)
    assert a.to_levels().equals(b.to_levels())
    assert not np.array_equal(a.temperature[:500], c.temperature[:500], equal_nan=True)


def test_same_seed_gives_byte_identical_csv(tmp_path):
    cfg = SimulationConfig(**SMALL)
    p1 = write_scenario(tmp_path / "a", n_cruises=2, seed=3, config=cfg, formats=("csv",))
    p2 = write_scenario(tmp_path / "b", n_cruises=2, seed=3, config=cfg, formats=("csv",))
    csv1 = [p for p in p1 if p.suffix == ".csv"]
    assert len(csv1) == 2 and [p.name for p in p1] == [p.name for p in p2]
    for x, y in zip(csv1, [p for p in p2 if p.suffix == ".csv"], strict=True):
        assert hashlib.sha256(x.read_bytes()).digest() == hashlib.sha256(y.read_bytes()).digest()
    p3 = write_scenario(tmp_path / "c", n_cruises=2, seed=4, config=cfg, formats=("csv",))
    assert p3[0].read_bytes() != csv1[0].read_bytes()
    info = json.loads((tmp_path / "a" / "scenario.json").read_text())
    assert info["seed"] == 3 and info["invented"] is True and "qcflag_version" in info
    assert SimulationConfig.from_dict(info["config"]) == cfg


def test_write_scenario_formats_roundtrip_and_overwrite(tmp_path):
    from qcflag.io.files import read_file

    cfg = SimulationConfig(casts_per_cruise=3, floats_per_cruise=0, max_cast_pressure=150.0)
    paths = write_scenario(tmp_path, n_cruises=1, seed=0, config=cfg)
    assert [p.suffix for p in paths] == [".csv", ".nc", ".json"]
    orig = simulate_archive(1, seed=0, config=cfg)
    for p in paths[:2]:
        back = read_file(p)
        assert back.n_levels == orig.n_levels
        assert np.allclose(back.temperature, orig.temperature, equal_nan=True)
        assert np.array_equal(back.flags["salinity"], orig.flags["salinity"])
        assert np.array_equal(back.extra["truth_salinity_grade"].to_numpy(dtype=int),
                              orig.extra["truth_salinity_grade"].to_numpy(dtype=int))
    before = paths[0].read_bytes()
    with pytest.raises(OutputExistsError):
        write_scenario(tmp_path, n_cruises=1, seed=1, config=cfg)
    assert paths[0].read_bytes() == before  # nothing replaced
    with pytest.raises(QCFlagError, match="format"):
        write_scenario(tmp_path / "x", n_cruises=1, config=cfg, formats=("xlsx",))


def test_bad_arguments():
    with pytest.raises(QCFlagError, match="unknown fault kind"):
        SimulationConfig(fault_rates={"gremlins": 0.1})
    with pytest.raises(QCFlagError, match="probability"):
        SimulationConfig(fault_rates={"stuck": 1.5})
    with pytest.raises(QCFlagError, match="n_cruises"):
        simulate_archive(0)
    with pytest.raises(QCFlagError, match="seed"):
        simulate_archive(1, seed=-1)
    with pytest.raises(QCFlagError, match="mistake_rate"):
        SimulationConfig(mistake_rate=(0.5, 0.1))


# ------------------------------------------------------------------- physical plausibility
def test_clean_profiles_stable_and_in_published_ranges(clean_run):
    b = clean_run
    assert (b.extra["truth_fault"] == "").all()
    # Argo test 6 global ranges (qc-standards.md 1.3, values from memory there)
    assert np.nanmin(b.temperature) >= -2.5 and np.nanmax(b.temperature) <= 40.0
    assert np.nanmin(b.salinity) >= 2.0 and np.nanmax(b.salinity) <= 41.0
    assert b.pressure.min() >= 0.0
    # plausible for the NE Atlantic (common knowledge): 2-25 degC, 34.8-36.5
    assert np.nanmin(b.temperature) > 2.0 and np.nanmax(b.temperature) < 25.0
    assert np.nanmin(b.salinity) > 34.8 and np.nanmax(b.salinity) < 36.5
    a, c = _pairs(b)
    # Argo test 8: pressure increases
    assert np.all(b.pressure[c] > b.pressure[a])
    # Argo test 14: no potential-density decrease over 0.03 kg/m3 (TEOS-10 via gsw)
    drop = _density_drop(b, a, c)
    assert np.nanmax(drop) < 0.03
    # Argo test 9 does not fire on clean data
    for var, (shallow, deep) in (("temperature", (6.0, 2.0)), ("salinity", (0.9, 0.3))):
        stat = _argo_spike(b, b.values(var))
        thr = np.where(b.pressure < 500.0, shallow, deep)
        assert np.nanmax(stat / thr) < 0.1


def test_noise_free_background_is_statically_stable():
    cfg = SimulationConfig(fault_rates=NO_FAULTS, ctd_noise=(0.0, 0.0), float_noise=(0.0, 0.0),
                           fine_structure=0.0, casts_per_cruise=12)
    b = simulate_archive(4, seed=2, config=cfg)  # four seasons, both lines
    a, c = _pairs(b)
    drop = _density_drop(b, a, c)
    # values are stored to 1e-4, whose rounding alone moves density by < 1e-4 kg/m3
    assert np.nanmax(drop) < 2e-4


def test_seasonal_cycle_and_mixed_layer(clean_run):
    b = clean_run
    ctd = b.profiles["instrument"].to_numpy() == "ctd"
    month = b.profiles["time"].dt.month.to_numpy()
    top = b.temperature[b.offsets[:-1]]
    summer = ctd & np.isin(month, [7, 8, 9])
    winter = ctd & np.isin(month, [1, 2, 3])
    assert summer.any() and winter.any()
    assert top[summer].mean() > top[winter].mean() + 2.0


def test_positions_at_sea_and_casts_above_the_seafloor(default_run):
    from qcflag.reference import seafloor_depth

    prof = default_run.profiles
    depth = seafloor_depth(prof["truth_latitude"].to_numpy(), prof["truth_longitude"].to_numpy())
    pmax = np.maximum.reduceat(default_run.pressure, default_run.offsets[:-1])
    assert np.all(depth > 20.0)  # packaged ETOPO5: every true position is at sea
    assert np.all(pmax / 1.01 < depth)


# -------------------------------------------------------------------------- faults / truth
def test_every_fault_kind_appears_in_a_default_run(default_run):
    kinds = {k for f in default_run.extra["truth_fault"].unique() for k in f.split(";") if k}
    assert kinds == set(FAULT_KINDS)
    assert set(default_run.attrs["simulation"]["events"]["kind"]) == set(FAULT_KINDS)


def test_fault_rates_met_within_tolerance():
    rates = {"spike": 0.5, "spike_pair": 0.2, "offset": 0.1, "stuck": 0.1,
             "surface_noise": 0.2, "digit_rollover": 0.1, "missing_value": 0.1,
             "bad_position": 0.1, "bad_date": 0.1, "drift": 0.5, "density_inversion": 0.1,
             "thermal_lag": 0.3, "pressure_reversal": 0.1, "salinity_hook": 0.5}
    n_cruises = 40
    cfg = SimulationConfig(fault_rates=rates, **SMALL)
    b = simulate_archive(n_cruises, seed=9, config=cfg)
    ev = Counter(b.attrs["simulation"]["events"]["kind"])
    n = b.n_profiles
    n_ctd = int((b.profiles["instrument"] == "ctd").sum())
    # eligible population of each kind (see default_fault_rates): profiles, CTD casts or
    # cruises; the hook needs casts reaching near the bottom, checked separately below
    population = dict.fromkeys(rates, n)
    population.update(thermal_lag=n_ctd, pressure_reversal=n_ctd, drift=n_cruises)
    for kind, rate in rates.items():
        if kind == "salinity_hook":
            continue
        expected = population[kind] * rate
        var = expected if kind in ("spike", "spike_pair") else expected * (1 - rate)
        assert abs(ev[kind] - expected) < 4.0 * np.sqrt(var) + 1, (kind, ev[kind], expected)
    # hooks only on casts limited by the bottom: shallower than the standard cast depth
    pmax = np.maximum.reduceat(b.pressure, b.offsets[:-1])
    near_bottom = int(((b.profiles["instrument"] == "ctd").to_numpy()
                       & (pmax < SMALL["max_cast_pressure"] - 5)).sum())
    exp = near_bottom * 0.5
    assert abs(ev["salinity_hook"] - exp) < 4 * np.sqrt(exp * 0.5) + 1


def test_no_fault_no_flaw_equivalence(default_run):
    b = default_run
    clean = (b.extra["truth_fault"] == "").to_numpy()
    grades = np.stack([b.extra[f"truth_{v}_grade"].to_numpy() for v in VARS])
    assert np.array_equal(clean, (grades == 1).all(axis=0))
    assert 0.0 < np.mean(~clean) < 0.5


def test_missing_values_truth_and_flags(default_run):
    b = default_run
    for v in ("temperature", "salinity"):
        nan = np.isnan(b.values(v))
        assert nan.any()
        assert np.array_equal(nan, b.extra[f"truth_{v}_grade"].to_numpy() == 0)
        assert np.all(b.flags[v][nan] == 9)
        assert np.all(b.flags[v][~nan] != 9)


def test_pressure_reversal_truth_matches_argo_test_8(default_run):
    b = default_run
    # Argo test 8: a level whose pressure is not above every earlier pressure of its profile
    p = b.pressure + b.profile_index * 1e5  # make the running max restart at each profile
    runmax = np.maximum.accumulate(p)
    prev_max = np.concatenate([[-np.inf], runmax[:-1]])
    reversed_ = (p <= prev_max) & ~b.first_level
    truth4 = b.extra["truth_pressure_grade"].to_numpy() == 4
    assert reversed_.any()
    assert np.array_equal(reversed_, truth4)


def test_spike_truth_straddles_argo_threshold():
    cfg = SimulationConfig(fault_rates={**NO_FAULTS, "spike": 2.0}, **SMALL)
    b = simulate_archive(8, seed=4, config=cfg)
    only = (b.extra["truth_fault"] == "spike").to_numpy()
    n3 = n4 = 0
    for var, (shallow, deep) in (("temperature", (6.0, 2.0)), ("salinity", (0.9, 0.3))):
        g = b.extra[f"truth_{var}_grade"].to_numpy()
        stat = _argo_spike(b, b.values(var))
        thr = np.where(b.pressure < 500.0, shallow, deep)
        # isolated spikes (both neighbours good in this variable)
        iso = np.zeros(g.size, bool)
        i = np.flatnonzero(~b.first_level & ~b.last_level)
        iso[i] = (g[i - 1] <= 2) & (g[i + 1] <= 2)
        sel3 = only & iso & (g == 3)
        sel4 = only & iso & (g == 4)
        n3, n4 = n3 + sel3.sum(), n4 + sel4.sum()
        # grade 3: below the threshold, and visible (>= 5 % of it) unless it sits in a sharp
        # thermocline, where the statistic subtracts half the neighbours' difference;
        # grade 4: above it, up to that same half-difference
        assert np.all(stat[sel3] <= thr[sel3] * 1.001)
        assert np.mean(stat[sel3] > 0.04 * thr[sel3]) > 0.9
        assert np.mean(stat[sel4] > thr[sel4]) > 0.9
    assert n3 > 20 and n4 > 10


def test_stuck_and_rollover_truth(default_run):
    b = default_run
    f = b.extra["truth_fault"].to_numpy()
    n_stuck = n_roll = 0
    for var, jump in (("temperature", 10.0), ("salinity", 5.0)):
        x = b.values(var)
        g = b.extra[f"truth_{var}_grade"].to_numpy()
        stuck = np.flatnonzero((f == "stuck") & (g == 4))
        stuck = stuck[~np.isnan(x[stuck - 1])]  # a dropout may sit inside the run
        n_stuck += stuck.size
        assert np.all(x[stuck] == x[stuck - 1])
        roll = (f == "digit_rollover") & (g == 4)
        starts = np.flatnonzero(roll[1:] & ~roll[:-1]) + 1
        starts = starts[~b.first_level[starts] & (g[starts - 1] <= 2)]
        n_roll += starts.size
        # Argo test 12 (digit rollover): adjacent difference over 10 degC / 5
        assert np.all(np.abs(x[starts] - x[starts - 1]) > jump * 0.95)
    assert n_stuck > 0 and n_roll > 0


def test_density_inversion_truth_matches_teos10():
    cfg = SimulationConfig(fault_rates={**NO_FAULTS, "density_inversion": 0.5}, **SMALL)
    b = simulate_archive(6, seed=8, config=cfg)
    g = b.extra["truth_salinity_grade"].to_numpy()
    bad = g >= 3
    tops = np.flatnonzero(bad & ~b.first_level)
    tops = tops[~bad[tops - 1]]
    assert tops.size > 10
    drop = _density_drop(b, tops - 1, tops)
    assert np.array_equal(drop > 0.03, g[tops] == 4)
    assert np.all(b.extra["truth_temperature_grade"].to_numpy()[bad] == 2)


def test_metadata_faults(default_run):
    prof = default_run.profiles
    moved = (prof["latitude"] != prof["truth_latitude"]) | (
        prof["longitude"] != prof["truth_longitude"])
    redated = prof["time"] != prof["truth_time"]
    ev = default_run.attrs["simulation"]["events"]
    pos = {p for k, p in zip(ev["kind"], ev["profile"], strict=True) if k == "bad_position"}
    dat = {p for k, p in zip(ev["kind"], ev["profile"], strict=True) if k == "bad_date"}
    assert set(np.flatnonzero(moved.to_numpy())) == pos
    assert set(np.flatnonzero(redated.to_numpy())) == dat
    from qcflag.reference import seafloor_depth

    wrong = prof.loc[moved]
    # the wrong positions are on land or far from the programme's region
    far = (np.abs(wrong["latitude"] - wrong["truth_latitude"]) > 5) | (
        np.abs(wrong["longitude"] - wrong["truth_longitude"]) > 5)
    land = seafloor_depth(wrong["latitude"].to_numpy(), wrong["longitude"].to_numpy()) < 0
    assert np.all(far.to_numpy() | land)


# -------------------------------------------------------------------------------- operators
def _manual_grades(b, var):
    g, _ = decode(b.flags[var], "argo")
    return g


def test_manual_error_column_is_disagreement(default_run):
    b = default_run
    any_err = np.zeros(b.n_levels, bool)
    for v in VARS:
        t = b.extra[f"truth_{v}_grade"].to_numpy()
        m = _manual_grades(b, v)
        d = (t > 0) & (m != t)
        flagged = b.extra[f"truth_{v}_manual_error"].to_numpy()
        assert flagged.dtype == bool
        assert not np.any(flagged & ~d)  # an error is always a disagreement
        # disagreements not counted as errors are all 'probably good' written 1 (habit)
        assert np.all(((t == 2) & (m == 1))[d & ~flagged])
        if v != "pressure":
            assert np.any(d & ~flagged)
            any_err |= flagged
    # the combined column is the OR over the judged variables
    np.testing.assert_array_equal(b.extra["truth_manual_error"].to_numpy(), any_err)
    # operators disagree with the truth on some levels, but not on most flagged ones
    t = b.extra["truth_salinity_grade"].to_numpy()
    m = _manual_grades(b, "salinity")
    assert 0.0 < np.mean(m[t >= 3] != t[t >= 3]) < 0.6


def test_default_scenario_is_mostly_good():
    # most levels good; truly probably-bad-or-bad levels a few percent per variable
    b = simulate_archive(12, seed=4, config=SimulationConfig(**SMALL))
    for v in ("temperature", "salinity"):
        t = b.extra[f"truth_{v}_grade"].to_numpy()
        share = np.mean(t[t > 0] >= 3)
        assert 0.002 < share < 0.08, (v, share)
        assert np.mean(t[t > 0] == 1) > 0.8


def test_calibration_faults_graded_by_detectability():
    # offsets and drift: truth 3 only where the error exceeds what can be told from the
    # other casts of a cruise (_simfaults.DETECTABLE), 2 below it, 4 from the gross limits
    from qcflag._simfaults import CALIBRATION, DETECTABLE
    from qcflag.features import cruise_deviation, deep_levels

    rates = {**NO_FAULTS, "offset": 0.5}
    b = simulate_archive(6, seed=8, config=SimulationConfig(fault_rates=rates, **SMALL))
    clean = simulate_archive(6, seed=8, config=SimulationConfig(fault_rates=NO_FAULTS,
                                                                **SMALL))
    for v in ("temperature", "salinity"):
        err = b.values(v) - clean.values(v)
        t = b.extra[f"truth_{v}_grade"].to_numpy()
        hit = (b.extra["truth_fault"] == "offset").to_numpy() & (np.abs(err) > 1e-9)
        assert hit.any()
        a = np.abs(err[hit])
        expected = 1 + (a >= CALIBRATION[v][0]) + (a >= DETECTABLE[v]) + (a >= CALIBRATION[v][2])
        np.testing.assert_array_equal(t[hit], expected)
        # the detectability is several times the typical deep deviation of a clean cast
        # from its cruise median at the same pressure
        dev = cruise_deviation(clean, clean.values(v))
        typical = np.nanmedian(np.abs(dev[deep_levels(clean)]))
        assert 2.0 * typical < DETECTABLE[v] < 10.0 * typical, (v, typical)


def _habits(**kw):
    base = {"miss_small": (0.0, 0.0), "miss_large": (0.0, 0.0), "severity_bias": (0.0, 0.0),
            "probably_good_use": (1.0, 1.0), "mistake_rate": (0.0, 0.0),
            "false_flag_rate": (0.0, 0.0)}
    base.update(kw)
    return base


def test_perfect_operators_reproduce_truth():
    cfg = SimulationConfig(**SMALL, **_habits())
    b = simulate_archive(6, seed=1, config=cfg)
    assert not b.extra["truth_manual_error"].any()
    for v in VARS:
        t = b.extra[f"truth_{v}_grade"].to_numpy()
        m = _manual_grades(b, v)
        assert np.array_equal(m[t > 0], t[t > 0])


def test_operator_mistake_rate():
    rate = 0.03
    cfg = SimulationConfig(**SMALL, **_habits(mistake_rate=(rate, rate)))
    b = simulate_archive(20, seed=2, config=cfg)
    flagged = wrong = 0
    for v in ("temperature", "salinity"):
        t = b.extra[f"truth_{v}_grade"].to_numpy()
        m = _manual_grades(b, v)
        sel = t >= 2
        flagged += sel.sum()
        wrong += (m[sel] != t[sel]).sum()
        assert np.array_equal(m[t == 1], t[t == 1])  # good levels untouched
    share = wrong / flagged
    assert abs(share - rate) < 4 * np.sqrt(rate * (1 - rate) / flagged) + 0.002


def test_operator_misses_whole_small_events_and_severity_habits():
    rates = {**NO_FAULTS, "bad_position": 0.3}  # one event = one profile, all levels truth 3
    miss = 0.4
    cfg = SimulationConfig(fault_rates=rates, **SMALL, **_habits(miss_small=(miss, miss)))
    b = simulate_archive(20, seed=6, config=cfg)
    m = _manual_grades(b, "temperature")
    per_prof = np.maximum.reduceat(m, b.offsets[:-1])
    minp = np.minimum.reduceat(m, b.offsets[:-1])
    hit = np.array(sorted(set(b.attrs["simulation"]["events"]["profile"])))
    assert np.all(per_prof[hit] == minp[hit])  # all or nothing per event
    missed = np.mean(per_prof[hit] == 1)
    assert abs(missed - miss) < 4 * np.sqrt(miss * (1 - miss) / hit.size)
    # harsh operators write 4 for truth 3; soft ones 3 for truth 4
    harsh = simulate_archive(4, seed=6, config=SimulationConfig(
        fault_rates=rates, **SMALL, **_habits(severity_bias=(1.0, 1.0))))
    t = harsh.extra["truth_temperature_grade"].to_numpy()
    assert np.all(_manual_grades(harsh, "temperature")[t == 3] == 4)
    soft_rates = {**NO_FAULTS, "stuck": 0.5}
    soft = simulate_archive(4, seed=6, config=SimulationConfig(
        fault_rates=soft_rates, **SMALL, **_habits(severity_bias=(-1.0, -1.0))))
    for v in ("temperature", "salinity"):
        t = soft.extra[f"truth_{v}_grade"].to_numpy()
        assert (t == 4).any()
        assert np.all(_manual_grades(soft, v)[t == 4] == 3)


def test_probably_good_habit_and_false_flags():
    rates = {**NO_FAULTS, "spike": 1.0}
    never = simulate_archive(6, seed=3, config=SimulationConfig(
        fault_rates=rates, **SMALL, **_habits(probably_good_use=(0.0, 0.0))))
    for v in ("temperature", "salinity"):
        assert not np.any(_manual_grades(never, v) == 2)
        assert np.any(never.extra[f"truth_{v}_grade"].to_numpy() == 2)
    ff = 0.002
    noisy = simulate_archive(6, seed=3, config=SimulationConfig(
        fault_rates=NO_FAULTS, **SMALL, **_habits(false_flag_rate=(ff, ff))))
    m = _manual_grades(noisy, "salinity")
    share = np.mean(m >= 3)
    assert ff < share < ff * 6.0  # runs of 1-6 levels start at rate ff
    assert not np.any(_manual_grades(noisy, "pressure") >= 2)


# ------------------------------------------------------------------------------ CLI / demo
def test_cli_simulate(tmp_path):
    from qcflag.cli import app

    runner = CliRunner()
    out = tmp_path / "scen"
    args = ["simulate", "--out", str(out), "--cruises", "1", "--seed", "2"]
    res = runner.invoke(app, args)
    assert res.exit_code == 0, res.output
    assert "scenario.json" in res.output and (out / "scenario.json").is_file()
    assert len(list(out.glob("*.csv"))) == 1 and not list(out.glob("*.nc"))
    res = runner.invoke(app, args)
    assert res.exit_code == 1 and "--overwrite" in res.output
    assert runner.invoke(app, [*args, "--overwrite", "--format", "both"]).exit_code == 0
    assert len(list(out.glob("*.nc"))) == 1
    assert runner.invoke(app, [*args, "--format", "xlsx"]).exit_code == 2
    assert runner.invoke(app, ["simulate", "--help"]).exit_code == 0


def test_demo_files_are_regenerated_byte_identically(tmp_path):
    demo = ROOT / "examples" / "demo"
    if not demo.is_dir():
        pytest.skip("examples/demo is not in this checkout")
    info = json.loads((demo / "scenario.json").read_text())
    assert SimulationConfig.from_dict(info["config"]) == demo_config()
    paths = write_scenario(tmp_path, n_cruises=info["n_cruises"], seed=info["seed"],
                           config=demo_config(), formats=("csv",))
    csvs = [p for p in paths if p.suffix == ".csv"]
    assert [p.name for p in csvs] == sorted(p.name for p in demo.glob("*.csv"))
    for p in csvs:
        assert p.read_bytes() == (demo / p.name).read_bytes(), p.name
    total = sum(f.stat().st_size for f in demo.iterdir())
    assert total < 3_000_000
