"""Stuck value (Argo test 13) and flat line (QARTOD) against their published definitions.

Sources: ARGO-QC (DOI 10.13155/33951) test 13 via ../shared/reference/qc-standards.md §1.3
(tag M); QARTOD flat line, glider T/S manual DOI 10.25607/OBP-1465, via the sheet §4.3
(example counts verified) and worked example E20 (derived).
"""

from __future__ import annotations

import numpy as np
import pytest
from _checks_support import make_batch

from qcflag.checks import flat_line, stuck_value


def test_stuck_value_whole_profile_identical():
    b = make_batch(
        {"pressure": [10, 20, 30, 40], "temperature": [5.0, 5.0, 5.0, 5.0]},
        {"pressure": [10, 20, 30, 40], "temperature": [5.0, 5.0, 5.001, 5.0]},
        {"pressure": [10], "temperature": [5.0]},  # one level: not judged
        {"pressure": [10, 20, 30], "temperature": [7.0, np.nan, 7.0]},
    )
    r = stuck_value(b, variable="temperature")
    assert r.grade.tolist() == [4, 4, 4, 4, 1, 1, 1, 1, 0, 4, 0, 4]
    assert r.statistic[0] == 0.0
    assert r.statistic[4] == pytest.approx(0.001)
    assert np.isnan(r.statistic[8])


def test_stuck_value_ignores_excluded_levels():
    b = make_batch({"pressure": [10, 20, 30], "salinity": [35.0, 99.0, 35.0]})
    excl = np.array([False, True, False])
    assert stuck_value(b, variable="salinity", exclude=excl).grade.tolist() == [4, 4, 4]
    assert stuck_value(b, variable="salinity").grade.tolist() == [1, 1, 1]


def _run_profile(n_same, n_total=40):
    t = np.linspace(20.0, 4.0, n_total)
    t[5:5 + n_same] = t[5]
    return make_batch({"pressure": np.arange(1.0, n_total + 1), "temperature": t})


@pytest.mark.parametrize(
    ("n_same", "grade"),
    # E20 (QARTOD counts 10 / 20): 11 identical values -> 3; 21 identical -> 4
    [(10, 1), (11, 3), (20, 3), (21, 4), (25, 4)],
)
def test_flat_line_counts_e20(n_same, grade):
    b = _run_profile(n_same)
    r = flat_line(b, variable="temperature", eps=0.0, suspect_count=10, fail_count=20)
    run = slice(5, 5 + n_same)
    assert (r.grade[run] == grade).all()  # every member of the run, including the first
    assert (r.statistic[run] == n_same).all()
    others = np.ones(r.grade.size, dtype=bool)
    others[run] = False
    assert (r.grade[others] == 1).all()
    assert (r.statistic[others] == 1).all()


def test_flat_line_eps_and_boundaries():
    # with eps, differences up to eps count as repeats; runs never cross profiles
    t1 = [10.0, 10.004, 10.008, 10.012, 9.0]
    b = make_batch({"pressure": [1, 2, 3, 4, 5], "temperature": t1},
                   {"pressure": [1, 2], "temperature": [9.0, 9.0]})
    r = flat_line(b, variable="temperature", eps=0.005, suspect_count=2, fail_count=3)
    assert r.statistic.tolist() == [4, 4, 4, 4, 1, 2, 2]
    assert r.grade.tolist() == [4, 4, 4, 4, 1, 1, 1]
    r0 = flat_line(b, variable="temperature", eps=0.0, suspect_count=2, fail_count=3)
    assert r0.statistic.tolist() == [1, 1, 1, 1, 1, 2, 2]


def test_flat_line_run_continues_across_missing_and_excluded():
    t = [5.0, 5.0, np.nan, 5.0, 40.0, 5.0, 6.0]
    b = make_batch({"pressure": np.arange(1.0, 8.0), "temperature": t})
    excl = np.array([False, False, False, False, True, False, False])
    r = flat_line(b, variable="temperature", exclude=excl, suspect_count=3, fail_count=10)
    assert r.statistic[[0, 1, 3, 5]].tolist() == [4, 4, 4, 4]
    assert r.grade.tolist() == [3, 3, 0, 3, 0, 3, 1]
