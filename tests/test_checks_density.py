"""Density inversion against TEOS-10 (gsw) and the worked values of the reference sheet.

Sources: ARGO-QC (DOI 10.13155/33951) test 14 via ../shared/reference/qc-standards.md §1.3
(threshold 0.03 kg/m3, mid-point reference pressure, two sweeps: tag M) and worked examples
E11-E13 (computed by the sheet's author with TEOS-10 GSW 3.6.23, tag D).
"""

from __future__ import annotations

import gsw
import numpy as np
import pytest
from _checks_support import make_batch

from qcflag.checks import density_inversion


def _pair(t_b, s_b, t_a=10.0, s_a=35.0):
    # E11 set-up: lon -30, lat 30; A at 100 dbar, B at 110 dbar
    return make_batch({"pressure": [100.0, 110.0], "temperature": [t_a, t_b],
                       "salinity": [s_a, s_b], "lat": 30.0, "lon": -30.0})


def test_e11_sheet_values_and_direct_gsw():
    out = density_inversion(_pair(10.5, 35.0), threshold=0.03)
    drop = out["temperature"].statistic
    # E11: rho_theta(A) = 1027.4288, rho_theta(B) = 1027.3413 at Pref 105 dbar
    assert drop[1] == pytest.approx(1027.4288 - 1027.3413, abs=2e-4)
    # direct gsw computation, written out here independently of the check
    SA = gsw.SA_from_SP([35.0, 35.0], [100.0, 110.0], -30.0, 30.0)
    CT = gsw.CT_from_t(SA, [10.0, 10.5], [100.0, 110.0])
    rho = gsw.rho(SA, CT, 105.0)
    assert rho[0] == pytest.approx(1027.4288, abs=1e-4)
    assert rho[1] == pytest.approx(1027.3413, abs=1e-4)
    assert drop[1] == pytest.approx(rho[0] - rho[1], rel=1e-12)
    # 0.0875 > 0.03: both sweeps grade the pair -> T and S of B (and A) 4
    assert out["temperature"].grade.tolist() == [4, 4]
    assert out["salinity"].grade.tolist() == [4, 4]


def test_e12_small_decrease_passes():
    out = density_inversion(_pair(10.1, 35.0))
    assert out["temperature"].statistic[1] == pytest.approx(0.0171, abs=2e-4)  # E12
    assert out["temperature"].grade.tolist() == [1, 1]


def test_e13_salinity_driven_inversion():
    out = density_inversion(_pair(10.0, 34.90))
    assert out["salinity"].statistic[1] == pytest.approx(0.0778, abs=2e-4)  # E13
    assert out["salinity"].grade.tolist() == [4, 4]
    out = density_inversion(_pair(10.0, 34.98))
    assert out["salinity"].statistic[1] == pytest.approx(0.0154, abs=2e-4)  # E13
    assert out["salinity"].grade.tolist() == [1, 1]


def test_threshold_is_strict():
    base = density_inversion(_pair(10.5, 35.0))["temperature"].statistic[1]
    assert density_inversion(_pair(10.5, 35.0), threshold=base)["temperature"].grade[1] == 1
    assert density_inversion(_pair(10.5, 35.0),
                             threshold=np.nextafter(base, 0))["temperature"].grade[1] == 4


def test_sweeps_flag_deeper_and_shallower_level_and_use_valid_pairs():
    # a warm level in a stable profile: lighter than above (top-down flags it) and the
    # level above is denser than it (bottom-up flags the level above); a NaN is skipped.
    p = [10.0, 20.0, 30.0, 40.0, 50.0, 60.0]
    t = [20.0, 19.0, 18.0, 19.5, np.nan, 16.0]
    s = [35.0] * 6
    b = make_batch({"pressure": p, "temperature": t, "salinity": s, "lat": 10.0,
                    "lon": 150.0})
    out = density_inversion(b)
    assert out["temperature"].grade.tolist() == [1, 1, 4, 4, 0, 1]
    # S is present at the level without T, but that level is in no pair: not judged
    assert out["salinity"].grade.tolist() == [1, 1, 4, 4, 0, 1]
    # the pair (40, 60 dbar) skips the missing level: compare with gsw directly
    SA = gsw.SA_from_SP([35.0, 35.0], [40.0, 60.0], 150.0, 10.0)
    CT = gsw.CT_from_t(SA, [19.5, 16.0], [40.0, 60.0])
    rho = gsw.rho(SA, CT, 50.0)
    assert out["temperature"].statistic[5] == pytest.approx(rho[0] - rho[1], rel=1e-12)
    # excluding the warm level (already bad) removes the inversion; it is in no pair itself
    excl = np.array([False, False, False, True, False, False])
    assert density_inversion(b, exclude=excl)["temperature"].grade.tolist() == \
        [1, 1, 1, 0, 0, 1]
