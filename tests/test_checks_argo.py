"""Real expert-passed Argo profiles: no false alarms, and injected faults are all caught.

Data: ../shared/data/argo (three profiles whose every PRES/TEMP/PSAL level carries QC flag
1 after expert review; Argo GDAC, https://doi.org/10.17882/42182). Fault sizes are the
published thresholds: spike test values of ARGO-QC test 9 (TEMP 6.0 degC above 500 dbar,
PSAL 0.3 below 500 dbar; via ../shared/reference/qc-standards.md §1.3, tag M) and the
QARTOD flat-line fail count (REP_CNT_FAIL = 20, sheet §4.3, example value verified).
"""

from __future__ import annotations

import numpy as np
import pytest
from _checks_support import load

from qcflag import ProfileBatch
from qcflag.rules import run_checks


@pytest.fixture(scope="module")
def argo(argo_files) -> ProfileBatch:
    return load(argo_files)


def _with(batch: ProfileBatch, **arrays) -> ProfileBatch:
    values = {n: getattr(batch, n).copy() for n in ("pressure", "temperature", "salinity")}
    values.update(arrays)
    return ProfileBatch(offsets=batch.offsets, profiles=batch.profiles, **values)


def test_expert_passed_profiles_raise_no_flag(argo):
    table = run_checks(argo, "standard")
    for (check, var), res in table.results.items():
        assert not res.fired.any(), f"{check} fired on {var} of expert-passed profiles"
    # the checks did run (grade 1 somewhere) rather than abstain everywhere
    for var in ("temperature", "salinity"):
        assert (table.results[("spike", var)].grade == 1).sum() > 200
        assert (table.results[("density_inversion", var)].grade == 1).sum() > 200


def _level(batch, k, above=True):
    """A mid-profile level of profile k shallower (or deeper) than 500 dbar."""
    lo, hi = batch.offsets[k], batch.offsets[k + 1]
    p = batch.pressure[lo:hi]
    sel = np.flatnonzero((p < 400) & (p > 50)) if above else np.flatnonzero(p > 700)
    return lo + sel[len(sel) // 2]


def test_injected_faults_of_published_size_are_all_caught(argo):
    t, s = argo.temperature.copy(), argo.salinity.copy()
    injected_t, injected_s = [], []
    # a temperature spike above 500 dbar: test value just over 6.0 degC (ARGO-QC test 9)
    i = _level(argo, 0, above=True)
    t[i] = (t[i - 1] + t[i + 1]) / 2 + abs(t[i + 1] - t[i - 1]) / 2 + 6.05
    injected_t.append(i)
    # a salinity spike at depth: test value just over 0.3 (ARGO-QC test 9, P >= 500 dbar)
    j = _level(argo, 1, above=False)
    s[j] = (s[j - 1] + s[j + 1]) / 2 + abs(s[j + 1] - s[j - 1]) / 2 + 0.31
    injected_s.append(j)
    # a stuck run: 21 repeats of one value (QARTOD REP_CNT_FAIL = 20)
    lo = argo.offsets[2] + 20
    t[lo + 1:lo + 22] = t[lo]
    injected_t.extend(range(lo + 1, lo + 22))
    table = run_checks(_with(argo, temperature=t, salinity=s), "standard")
    vt, vs = table.verdict("temperature"), table.verdict("salinity")
    assert (vt[injected_t] >= 3).all(), vt[injected_t]
    assert (vs[injected_s] >= 3).all()
    assert table.results[("spike", "temperature")].grade[i] == 4
    assert table.results[("spike", "salinity")].grade[j] == 4
    # nothing else in the untouched profile 0 fires apart from the spike (policy: the spike
    # is not used as a neighbour later, so digit rollover/density stay quiet around it)
    p0 = np.arange(argo.offsets[0], argo.offsets[1])
    fired = p0[vt[p0] >= 3]
    assert fired.tolist() == [i]


def test_injected_density_inversion_is_caught(argo):
    t = argo.temperature.copy()
    k = _level(argo, 2, above=True)
    t[k] = t[k - 1] + 1.0  # warmer than the level above at the same salinity: inversion
    table = run_checks(_with(argo, temperature=t), "standard")
    res = table.results[("density_inversion", "temperature")]
    assert res.grade[k] == 4 and res.statistic[k] > 0.03
