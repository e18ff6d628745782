"""Spike and gradient against the Argo manual's formulas, thresholds and worked values.

Source: ARGO-QC (DOI 10.13155/33951) tests 9 and 11 via ../shared/reference/qc-standards.md
§1.3 (formula and thresholds tagged M, from memory; spike thresholds also consistent with
independent secondary sources per the sheet's review note) and worked examples E5-E9.
"""

from __future__ import annotations

import numpy as np
import pytest
from _checks_support import make_batch

from qcflag.checks import gradient, spike

T_LIMITS = {"shallow_limit": 6.0, "deep_limit": 2.0, "breakpoint": 500.0}  # ARGO-QC test 9
S_LIMITS = {"shallow_limit": 0.9, "deep_limit": 0.3, "breakpoint": 500.0}  # ARGO-QC test 9


def _middle(values, pressure, var="temperature", limits=T_LIMITS, func=spike):
    p = [pressure - 10.0, pressure, pressure + 10.0]
    b = make_batch({"pressure": p, var: values})
    r = func(b, variable=var, **limits)
    assert r.grade[0] == 0 and r.grade[2] == 0  # ends have no V1 or V3
    return float(r.statistic[1]), int(r.grade[1])


def test_e5_e6_temperature_spike_at_100_dbar():
    assert _middle([10.0, 17.0, 10.0], 100.0) == (7.0, 4)  # E5: 7.0 > 6.0
    assert _middle([10.0, 15.0, 10.0], 100.0) == (5.0, 1)  # E6: 5.0 <= 6.0


@pytest.mark.parametrize(("v2", "grade"), [(16.0, 1), (15.99, 1), (16.01, 4)])
def test_temperature_spike_at_just_below_just_above_shallow_threshold(v2, grade):
    stat, g = _middle([10.0, v2, 10.0], 100.0)
    assert g == grade  # "exceeds" = strictly greater (sheet §1.3)
    assert stat == pytest.approx(v2 - 10.0)


def test_e7_temperature_spike_both_sides_of_500_dbar():
    assert _middle([4.0, 6.5, 4.0], 800.0) == (2.5, 4)  # E7: 2.5 > 2.0 at 800 dbar
    assert _middle([4.0, 6.5, 4.0], 100.0)[1] == 1  # E7: same values above 500 pass
    assert _middle([4.0, 6.5, 4.0], 499.9)[1] == 1  # P < 500: shallow limit
    assert _middle([4.0, 6.5, 4.0], 500.0)[1] == 4  # P >= 500: deep limit
    assert _middle([4.0, 6.0, 4.0], 500.0)[1] == 1  # 2.0 exactly passes
    assert _middle([4.0, 6.01, 4.0], 500.0)[1] == 4


def test_e8_a_step_is_not_a_spike():
    assert _middle([20.0, 20.0, 10.0], 100.0) == (0.0, 1)  # E8


def test_e9_salinity_spikes_shallow_and_deep():
    s, g = _middle([35.0, 36.0, 35.0], 50.0, "salinity", S_LIMITS)  # E9: 1.0 > 0.9
    assert g == 4 and s == pytest.approx(1.0)
    s, g = _middle([34.5, 34.85, 34.5], 600.0, "salinity", S_LIMITS)  # E9: 0.35 > 0.3
    assert g == 4 and s == pytest.approx(0.35)
    assert _middle([34.5, 34.85, 34.5], 499.0, "salinity", S_LIMITS)[1] == 1
    assert _middle([35.0, 35.9, 35.0], 50.0, "salinity", S_LIMITS)[1] == 1  # at 0.9
    assert _middle([34.5, 34.79, 34.5], 600.0, "salinity", S_LIMITS)[1] == 1  # 0.29


def test_spike_uses_valid_neighbours_only():
    # V1, V3 are the consecutive *valid* values: a NaN level and an excluded level are skipped
    b = make_batch({"pressure": [10, 20, 30, 40, 50],
                    "temperature": [10.0, np.nan, 17.0, 99.0, 10.0]})
    excl = np.array([False, False, False, True, False])
    r = spike(b, variable="temperature", exclude=excl, **T_LIMITS)
    assert r.grade.tolist() == [0, 0, 4, 4, 0]  # the excluded level is still judged itself
    assert r.statistic[2] == pytest.approx(7.0)
    # without the exclusion, 99 is V3 of 17 and the spike at 17 is hidden
    assert spike(b, variable="temperature", **T_LIMITS).grade[2] == 1


def test_spike_does_not_cross_profiles():
    b = make_batch({"pressure": [10, 20], "temperature": [10.0, 30.0]},
                   {"pressure": [10, 20], "temperature": [10.0, 10.0]})
    r = spike(b, variable="temperature", **T_LIMITS)
    assert r.grade.tolist() == [0, 0, 0, 0]
    assert np.isnan(r.statistic).all()


G_T = {"shallow_limit": 9.0, "deep_limit": 3.0, "breakpoint": 500.0}  # ARGO-QC test 11 (M)
G_S = {"shallow_limit": 1.5, "deep_limit": 0.5, "breakpoint": 500.0}  # ARGO-QC test 11 (M)


def test_gradient_thresholds_and_breakpoint():
    # test value |V2 - (V3+V1)/2|; on a gradient 10, 19, 10 it is 9.0 (derived)
    assert _middle([10.0, 19.0, 10.0], 100.0, limits=G_T, func=gradient) == (9.0, 1)
    assert _middle([10.0, 19.01, 10.0], 100.0, limits=G_T, func=gradient)[1] == 4
    assert _middle([4.0, 7.0, 4.0], 800.0, limits=G_T, func=gradient) == (3.0, 1)
    assert _middle([4.0, 7.01, 4.0], 800.0, limits=G_T, func=gradient)[1] == 4
    assert _middle([4.0, 7.01, 4.0], 499.0, limits=G_T, func=gradient)[1] == 1
    s = _middle([35.0, 36.51, 35.0], 100.0, "salinity", G_S, gradient)
    assert s[1] == 4
    assert _middle([35.0, 35.5, 35.0], 600.0, "salinity", G_S, gradient)[1] == 1
    assert _middle([35.0, 35.51, 35.0], 600.0, "salinity", G_S, gradient)[1] == 4
    # on a step the gradient value is not zero (unlike the spike value, E8)
    assert _middle([20.0, 20.0, 10.0], 100.0, limits=G_T, func=gradient)[0] == 5.0
