"""Impossible speed between consecutive fixes (Argo real-time test 5)."""

from __future__ import annotations

import gsw
import numpy as np
import pandas as pd
import pytest

from qcflag.checks.track import great_circle_distance, impossible_speed, track_codes
from qcflag.combine import FORCING
from qcflag.profiles import ProfileBatch
from qcflag.rules import load_rules, run_checks

DAY = 86_400.0
# Argo test 5: surface drift between fixes must not exceed 3 m/s ("exceeds" = strictly
# greater); ARGO-QC section 2.1.2 via ../shared/reference/qc-standards.md section 1.3 [from
# memory there]. The ship limit (10 m/s) is qcflag's own choice (common practice).
FLOAT_LIMIT = 3.0


def _track(lons, days, *, lat=0.0, instrument="float", platform="F1", cruise="c", extra=None):
    """One two-level profile per fix along a parallel; returns a ProfileBatch."""
    n = len(lons)
    start = pd.Timestamp("2020-01-01")
    prof = {
        "profile_id": [f"{platform}_{i}" for i in range(n)], "cruise": cruise,
        "time": [start + pd.Timedelta(days=d) for d in days],
        "latitude": np.full(n, lat), "longitude": np.asarray(lons, float),
        "platform": platform, "instrument": instrument,
    }
    if extra:
        prof.update(extra)
    p = np.tile([5.0, 50.0], n)
    return ProfileBatch(offsets=np.arange(0, 2 * n + 1, 2, dtype=np.int64), pressure=p,
                        temperature=np.full(p.size, 10.0), salinity=np.full(p.size, 35.0),
                        profiles=pd.DataFrame(prof))


def _per_profile(res, batch):
    g = res.grade[batch.offsets[:-1]]
    np.testing.assert_array_equal(res.grade, g[batch.profile_index])
    return g


def _lon_for_speed(speed, days, lat=0.0):
    """Longitude step (degrees) covering `speed` m/s for `days` along the parallel `lat`."""
    one_degree = great_circle_distance(np.array([lat]), np.array([0.0]), np.array([lat]),
                                       np.array([1.0]))[0]
    return speed * days * DAY / one_degree


def test_distance_matches_gsw():
    # TEOS-10 library gsw.distance: great-circle distance on a sphere of radius 6371 km
    rng = np.random.default_rng(3)
    lat1, lat2 = rng.uniform(-80, 80, (2, 200))
    lon1, lon2 = rng.uniform(-180, 180, (2, 200))
    ours = great_circle_distance(lat1, lon1, lat2, lon2)
    theirs = gsw.distance(np.vstack([lon1, lon2]), np.vstack([lat1, lat2]), axis=0)[0]
    np.testing.assert_allclose(ours, theirs, rtol=1e-9)
    # one degree of latitude on that sphere: 2 pi 6371 km / 360 = 111.19493 km (arithmetic)
    one = great_circle_distance(np.array([10.0]), np.array([5.0]), np.array([11.0]),
                                np.array([5.0]))
    np.testing.assert_allclose(one, 2 * np.pi * 6_371_000.0 / 360, rtol=1e-12)


@pytest.mark.parametrize(("speed", "grade"), [(2.99, 1), (3.01, 3)])
def test_middle_fix_just_below_and_above_the_float_limit(speed, grade):
    # fixes every 10 days; the middle one jumps away and back at `speed` m/s, while the
    # first and last are 1 km apart (so the detour is isolated)
    step = _lon_for_speed(speed, 10.0)
    b = _track([0.0, step, 0.009], [0, 10, 20])
    res = impossible_speed(b)
    for v in ("temperature", "salinity"):
        g = _per_profile(res[v], b)
        assert g.tolist() == [1, grade, 1]
    assert res["temperature"].statistic[2] == pytest.approx(speed, rel=2e-3)


def test_at_the_limit_passes():
    # "exceeds" is strictly greater: a limit equal to the needed speed passes
    step = _lon_for_speed(5.0, 10.0)
    b = _track([0.0, step, 0.0], [0, 10, 20])
    needed = impossible_speed(b)["temperature"].statistic[2]
    at = impossible_speed(b, float_max_speed=float(needed))["temperature"]
    assert _per_profile(at, b).tolist() == [1, 1, 1]
    above = impossible_speed(b, float_max_speed=float(np.nextafter(needed, 0)))["temperature"]
    assert _per_profile(above, b).tolist() == [1, 3, 1]


def test_ship_limit_applies_to_casts():
    # 6 m/s between stations: fine for a ship (limit 10 m/s), impossible for a float
    step = _lon_for_speed(6.0, 0.25)
    lons, days = [0.0, step, 2 * step, 3 * step], [0, 0.25, 0.5, 0.75]
    ship = _track(lons, days, instrument="ctd")
    assert _per_profile(impossible_speed(ship)["temperature"], ship).max() == 1
    # a transcription error (longitude sign flipped) on the ship's second station
    bad = list(lons)
    bad[1] = -40.0
    ship_bad = _track(bad, days, instrument="ctd")
    assert _per_profile(impossible_speed(ship_bad)["temperature"], ship_bad).tolist() == [
        1, 3, 1, 1]


def test_track_ends_are_isolated_by_the_next_fix():
    step = _lon_for_speed(0.1, 10.0)
    good = [k * step for k in range(4)]
    first_bad = _track([50.0, *good[1:]], [0, 10, 20, 30])
    last_bad = _track([*good[:3], 50.0], [0, 10, 20, 30])
    assert _per_profile(impossible_speed(first_bad)["salinity"], first_bad).tolist() == [
        3, 1, 1, 1]
    assert _per_profile(impossible_speed(last_bad)["salinity"], last_bad).tolist() == [
        1, 1, 1, 3]


def test_cannot_isolate_two_fixes_or_two_bad_in_a_row():
    pair = _track([0.0, 50.0], [0, 10])
    res = impossible_speed(pair)["temperature"]
    assert _per_profile(res, pair).tolist() == [1, 1]  # which one is wrong? no verdict of 3
    assert np.all(res.statistic > FLOAT_LIMIT)  # but the statistic shows the speed
    alone = _track([0.0], [0])
    r = impossible_speed(alone)["temperature"]
    assert r.grade.max() == 0 and np.isnan(r.statistic).all()


def test_order_in_the_file_and_other_tracks_do_not_matter():
    step = _lon_for_speed(0.1, 10.0)
    a = _track([0.0, step, 40.0, 3 * step, 4 * step], [0, 10, 20, 30, 40], platform="A")
    c = _track([0.0, 60.0, 2 * step], [0, 10, 20], platform="B", lat=10.0)
    both = ProfileBatch.concat([a, c])
    want = np.concatenate([_per_profile(impossible_speed(x)["temperature"], x)
                           for x in (a, c)])
    got = _per_profile(impossible_speed(both)["temperature"], both)
    np.testing.assert_array_equal(got, want)
    assert want.tolist() == [1, 1, 3, 1, 1, 1, 3, 1]
    # the same profiles in reverse file order give the same verdicts, profile for profile
    rev = both.select(np.arange(both.n_profiles)[::-1])
    got_rev = _per_profile(impossible_speed(rev)["temperature"], rev)
    np.testing.assert_array_equal(got_rev, want[::-1])


def test_tracks_are_platforms_within_cruises():
    prof = pd.DataFrame({"cruise": ["c1", "c1", "c2", None, "c1", None],
                         "platform": ["F9", "", "F9", "S1", "F9", None]})
    codes = track_codes(prof)
    assert codes[0] == codes[4]  # same float, same cruise
    assert len({codes[0], codes[2], codes[3]}) == 3  # other cruise / other platform
    assert codes[1] == -1 and codes[5] == -1  # platform unknown: on no track
    assert (track_codes(prof.drop(columns="platform")) == -1).all()


def test_floats_surfacing_together_are_not_one_track():
    # two floats of one cruise surface at the same instant far apart: fine when the
    # platforms are known; without platform identifiers nothing is judged
    step = _lon_for_speed(0.1, 10.0)
    a = _track([0.0, step, 2 * step], [0, 10, 20], platform="F1")
    c = _track([20.0, 20.0 + step, 20.0 + 2 * step], [0, 10, 20], platform="F2")
    both = ProfileBatch.concat([a, c])
    assert impossible_speed(both)["temperature"].grade.max() == 1
    prof = both.profiles.assign(platform="")
    anon = ProfileBatch(both.offsets, both.pressure, both.temperature, both.salinity, prof)
    assert impossible_speed(anon)["temperature"].grade.max() == 0


def test_unusable_fixes_are_skipped_and_not_judged():
    step = _lon_for_speed(0.1, 10.0)
    b = _track([0.0, step, 999.0, 3 * step], [0, 10, 20, 30])  # impossible longitude
    g = _per_profile(impossible_speed(b)["temperature"], b)
    assert g.tolist() == [1, 1, 0, 1]  # position's job (Argo test 3), not this check's


def test_missing_values_get_no_grade():
    b = _track([0.0, 60.0, 0.01], [0, 10, 20])
    t = b.temperature.copy()
    t[3] = np.nan
    b = ProfileBatch(b.offsets, b.pressure, t, b.salinity, b.profiles)
    g = impossible_speed(b)["temperature"].grade
    assert g.tolist() == [1, 1, 3, 0, 1, 1]


def test_rule_sets_run_it_and_it_forces_the_flag():
    assert "impossible_speed" in FORCING
    for name in ("standard", "coastal"):
        steps = [s for s in load_rules(name).steps if s.check == "impossible_speed"]
        assert len(steps) == 1 and steps[0].params["float_max_speed"] == FLOAT_LIMIT
    b = _track([0.0, 60.0, 0.01], [0, 10, 20])
    checks = run_checks(b, "standard")
    assert checks.results[("impossible_speed", "temperature")].grade.tolist() == [
        1, 1, 3, 3, 1, 1]


def test_caught_in_the_simulated_programme():
    # invented scenario (qcflag.simulate): transcription errors of ship positions are
    # caught; no correct fix is flagged
    from qcflag.demo import demo_config
    from qcflag.simulate import simulate_archive

    b = simulate_archive(12, seed=0, config=demo_config())
    res = impossible_speed(b)["temperature"]
    fault = b.extra["truth_fault"].astype(str).str.contains("bad_position").to_numpy()
    ship = (b.per_level("instrument").astype(str) != "float")
    assert (res.grade[fault & ship] >= 3).mean() > 0.9
    assert not (res.grade[~fault] >= 3).any()
