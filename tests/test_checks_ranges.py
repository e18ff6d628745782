"""Global and regional range, pressure increasing, digit rollover against the Argo manual.

Source of every threshold here: Argo Quality Control Manual (ARGO-QC), DOI 10.13155/33951,
real-time tests 6, 7, 8 and 12, as quoted in ../shared/reference/qc-standards.md §1.3
(tagged M there: from memory) and its worked examples E10, E15, E16.
"""

from __future__ import annotations

import numpy as np
import pytest
from _checks_support import make_batch

from qcflag.checks import digit_rollover, global_range, pressure_increasing, regional_range
from qcflag.checks._ragged import inside_polygon

RED_SEA = [[10.0, 40.0], [20.0, 50.0], [30.0, 30.0], [10.0, 40.0]]  # ARGO-QC test 7 (M)
MED = [[30.0, -6.0], [30.0, 40.0], [40.0, 35.0], [42.0, 20.0], [50.0, 15.0],
       [40.0, 5.0], [30.0, -6.0]]  # ARGO-QC test 7 (M)


@pytest.mark.parametrize(
    ("value", "grade"),
    # ARGO-QC test 6 TEMP -2.5..40.0 degC, inclusive (sheet §7); E15: 40.5 -> 4
    [(-2.6, 4), (-2.5, 1), (-2.4, 1), (39.9, 1), (40.0, 1), (40.01, 4), (40.5, 4)],
)
def test_global_range_temperature_limits(value, grade):
    b = make_batch({"pressure": [10.0], "temperature": [value]})
    r = global_range(b, variable="temperature", minimum=-2.5, maximum=40.0)
    assert r.grade.tolist() == [grade]
    assert (r.statistic[0] > 0) == (grade == 4)


@pytest.mark.parametrize(
    ("value", "grade"),
    # ARGO-QC test 6 PSAL 2.0..41.0; E15: 1.5 -> 4
    [(1.5, 4), (1.99, 4), (2.0, 1), (2.01, 1), (41.0, 1), (41.01, 4)],
)
def test_global_range_salinity_limits(value, grade):
    b = make_batch({"pressure": [10.0], "salinity": [value]})
    r = global_range(b, variable="salinity", minimum=2.0, maximum=41.0)
    assert r.grade.tolist() == [grade]


def test_global_range_pressure_grades_all_three_variables():
    # ARGO-QC test 6 v3.x pressure rule (M); E15: PRES -6 -> PRES, TEMP, PSAL 4; -3 -> 3
    p = [-6.0, -5.01, -5.0, -3.0, -2.4, -2.39, 0.0, 5.0]
    b = make_batch({"pressure": p, "salinity": [35.0] * 7 + [np.nan]})
    out = global_range(b, variable="pressure", minimum=-5.0, suspect_at_or_below=-2.4,
                       also_flag=["temperature", "salinity"])
    expected = [4, 4, 3, 3, 3, 1, 1, 1]
    assert out["pressure"].grade.tolist() == expected
    assert out["temperature"].grade.tolist() == expected
    assert out["salinity"].grade.tolist() == [*expected[:-1], 0]  # missing value: no grade
    np.testing.assert_allclose(out["pressure"].statistic, [-2.4 - x for x in p])


def test_inside_polygon_matches_matplotlib_path():
    # independent reference: matplotlib's Path.contains_points on the same polygon
    from matplotlib.path import Path

    rng = np.random.default_rng(3)
    lat, lon = rng.uniform(25, 55, 4000), rng.uniform(-10, 45, 4000)
    poly = np.array(MED)
    ref = Path(poly[:, ::-1]).contains_points(np.column_stack([lon, lat]))
    assert np.array_equal(inside_polygon(lat, lon, poly), ref)


def test_regional_range_mediterranean_and_red_sea():
    regions_t = [{"polygon": RED_SEA, "minimum": 21.7, "maximum": 40.0},
                 {"polygon": MED, "minimum": 10.0, "maximum": 40.0}]
    regions_s = [{"polygon": MED, "minimum": 2.0, "maximum": 40.0}]
    b = make_batch(
        # E16: Mediterranean 38N 5E, TEMP 9.5 -> 4 (< 10.0), PSAL 40.5 -> 4 (> 40.0)
        {"pressure": [5.0, 10.0, 20.0], "temperature": [9.5, 10.0, 9.99],
         "salinity": [40.5, 40.0, 38.0], "lat": 38.0, "lon": 5.0},
        # E16: the same values in the open Atlantic are not judged by test 7
        {"pressure": [5.0, 10.0, 20.0], "temperature": [9.5, 10.0, 9.99],
         "salinity": [40.5, 40.0, 38.0], "lat": 38.0, "lon": -30.0},
        # Red Sea (20N 40E is inside the published triangle): TEMP 21.7 limit
        {"pressure": [5.0, 10.0, 20.0], "temperature": [21.6, 21.7, 25.0], "lat": 20.0,
         "lon": 40.0},
    )
    t = regional_range(b, variable="temperature", regions=regions_t)
    s = regional_range(b, variable="salinity", regions=regions_s)
    assert t.grade.tolist() == [4, 1, 4, 0, 0, 0, 4, 1, 1]
    assert s.grade.tolist() == [4, 1, 1, 0, 0, 0, 0, 0, 0]
    assert np.isnan(t.statistic[3:6]).all()
    np.testing.assert_allclose(t.statistic[:3], [0.5, 0.0, 0.01], atol=1e-12)


def test_pressure_increasing_equal_and_reversed():
    # ARGO-QC test 8 (M): equal pressures -> all but the first 4; reversed levels -> 4
    b = make_batch(
        {"pressure": [10.0, 20.0, 20.0, 20.0, 30.0]},
        {"pressure": [10.0, 20.0, 30.0, 25.0, 28.0, 30.0, 40.0]},
        {"pressure": [5.0, 6.0, 7.0]},
    )
    out = pressure_increasing(b)
    expected = [1, 1, 4, 4, 1, 1, 1, 1, 4, 4, 4, 1, 1, 1, 1]
    for name in ("pressure", "temperature", "salinity"):
        assert out[name].grade.tolist() == expected
    st = out["pressure"].statistic
    assert np.isnan(st[0]) and np.isnan(st[5]) and np.isnan(st[12])
    np.testing.assert_allclose(st[8:11], [5.0, 2.0, 0.0])  # running max 30 minus pressure


def test_pressure_increasing_skips_excluded_and_missing():
    p = [10.0, 900.0, 20.0, np.nan, 30.0]
    b = make_batch({"pressure": p})
    excl = np.array([False, True, False, False, False])  # 900 already graded bad
    out = pressure_increasing(b, exclude=excl)
    assert out["pressure"].grade.tolist() == [1, 1, 1, 0, 1]
    assert pressure_increasing(b)["pressure"].grade.tolist() == [1, 1, 4, 0, 4]


@pytest.mark.parametrize(
    ("second", "grade"),
    # E10: 2.0 then 12.5 degC -> |d| 10.5 > 10 -> 4; exactly 10 passes ("exceeds")
    [(12.5, 4), (12.0, 1), (12.01, 4), (-8.5, 4)],
)
def test_digit_rollover_temperature(second, grade):
    b = make_batch({"pressure": [10.0, 20.0], "temperature": [2.0, second]})
    r = digit_rollover(b, variable="temperature", limit=10.0)
    assert r.grade.tolist() == [0, grade]
    assert r.statistic[1] == pytest.approx(abs(second - 2.0))


def test_digit_rollover_salinity_and_profile_boundary():
    # ARGO-QC test 12 (M): PSAL > 5
    b = make_batch({"pressure": [10.0, 20.0], "salinity": [30.0, 35.0]},
                   {"pressure": [10.0, 20.0], "salinity": [35.01, 35.0]})
    r = digit_rollover(b, variable="salinity", limit=5.0)
    # 35.0 - 30.0 = 5 exactly passes; no comparison across the profile boundary
    assert r.grade.tolist() == [0, 1, 0, 1]
