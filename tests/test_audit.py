from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from qcflag.audit import AUDIT_COLUMNS, audit, audit_summary, review_queue, write_audit
from qcflag.checks.base import CheckTable
from qcflag.exceptions import OutputExistsError
from qcflag.profiles import ProfileBatch
from qcflag.result import FlagResult, VariableFlags
from qcflag.schemes import NO_FLAG, State


def _batch(temp_flags, sal_flags=None, counts=(4, 4)):
    n = sum(counts)
    offsets = np.concatenate([[0], np.cumsum(counts)])
    prof = pd.DataFrame({
        "profile_id": [f"p{i}" for i in range(len(counts))],
        "cruise": ["C1", "C2"][: len(counts)],
        "time": pd.to_datetime(["2020-01-01"] * len(counts)),
        "latitude": [45.0] * len(counts), "longitude": [-20.0] * len(counts),
        "platform": ["s"] * len(counts),
        "operator": ["Ada", "Bo"][: len(counts)],
    })
    flags = {"temperature": np.array(temp_flags, dtype=np.int8)}
    if sal_flags is not None:
        flags["salinity"] = np.array(sal_flags, dtype=np.int8)
    p = np.tile(np.arange(counts[0]) * 10.0, len(counts))[:n]
    return ProfileBatch(offsets=offsets, pressure=p, temperature=np.linspace(10, 5, n),
                        salinity=np.full(n, 35.0), profiles=prof, flags=flags)


def _vf(grade, proba=None, confidence=None):
    g = np.asarray(grade, dtype=np.int8)
    n = g.size
    state = np.where(g > 0, State.ASSESSED, State.MISSING).astype(np.int8)
    if confidence is None:
        confidence = np.ones(n) if proba is None else proba[np.arange(n), np.maximum(g, 1) - 1]
    return VariableFlags(g, state, np.asarray(confidence, float),
                         np.array(["spike" if x >= 3 else "" for x in g], dtype=object),
                         g, np.zeros(n, bool), proba)


def _result(vfs, n):
    return FlagResult(variables=vfs, checks=CheckTable({}, n), profiles=pd.DataFrame())


def test_audit_rows_scores_and_order():
    # manual:  p0 -> 1 1 4 1 ; p1 -> 1 3 <none> 2
    b = _batch([1, 1, 4, 1, 1, 3, NO_FLAG, 2])
    auto = np.array([1, 4, 1, 1, 1, 3, 4, 1])
    proba = np.array([
        [0.9, 0.05, 0.03, 0.02],
        [0.05, 0.05, 0.1, 0.8],   # auto 4 vs manual 1: P(bad) = 0.9
        [0.7, 0.2, 0.05, 0.05],   # auto 1 vs manual 4: P(good) = 0.9
        [0.9, 0.05, 0.03, 0.02],
        [0.9, 0.05, 0.03, 0.02],
        [0.1, 0.1, 0.6, 0.2],
        [0.1, 0.1, 0.2, 0.6],     # no manual flag, auto 4: missed fault, P(bad) = 0.8
        [0.6, 0.3, 0.05, 0.05],   # auto 1 vs manual 2: same side, P(bad) = 0.1
    ])
    r = _result({"temperature": _vf(auto, proba)}, b.n_levels)
    t = audit(b, r, variables=("temperature",))
    assert list(t.columns) == list(AUDIT_COLUMNS)
    assert len(t) == 4
    # scores: p_wrong * |gap| = 0.9*3, 0.9*3, 0.8*3, 0.1*1 -> tie broken by level order
    np.testing.assert_allclose(t["score"], [2.7, 2.7, 2.4, 0.1])
    assert t["level"].tolist() == [1, 2, 2, 3]
    assert t["profile_id"].tolist() == ["p0", "p0", "p1", "p1"]
    assert t["kind"].tolist() == ["disagreement", "disagreement", "missed_fault", "disagreement"]
    assert t["manual_code"].tolist() == ["1", "4", "", "2"]
    assert t["grade_gap"].tolist() == [3, -3, 3, -1]
    assert t["operator"].tolist() == ["Ada", "Ada", "Bo", "Bo"]
    np.testing.assert_allclose(t["p_manual_wrong"], [0.9, 0.9, 0.8, 0.1])


def test_audit_rules_only_and_missing_levels():
    b = _batch([1, 1, 9, 4, 1, 1, 1, 1])
    auto = np.array([1, 4, 0, 4, 1, 1, 1, 3])  # level 2 missing (state MISSING)
    conf = np.array([1, 0.5, np.nan, 1, 1, 1, 1, 0.75])
    r = _result({"temperature": _vf(auto, None, conf)}, b.n_levels)
    t = audit(b, r, variables=("temperature",))
    # p0 level 1: manual 1, auto 4, rule confidence 0.5 -> 0.5 * 3 = 1.5
    # p1 level 3: manual 1, auto 3, rule confidence 0.75 -> 0.75 * 2 = 1.5 (tie: batch order)
    # p0 level 2 (manual 9, value missing) and p0 level 3 (both 4) give no row
    assert list(zip(t["profile_id"], t["level"], strict=True)) == [("p0", 1), ("p1", 3)]
    np.testing.assert_allclose(t["score"], [1.5, 1.5])


def test_review_queue_and_summary():
    b = _batch([1, 1, 4, 1, 1, 3, NO_FLAG, 2], [1, 1, 1, 1, 1, 1, 1, 1])
    auto_t = np.array([1, 4, 1, 1, 1, 3, 4, 1])
    auto_s = np.array([1, 1, 1, 1, 4, 1, 1, 1])
    pt = np.tile([0.9, 0.05, 0.03, 0.02], (8, 1))
    pt[[1, 6]] = [0.05, 0.05, 0.1, 0.8]
    pt[2] = [0.7, 0.2, 0.05, 0.05]
    ps = np.tile([0.9, 0.05, 0.03, 0.02], (8, 1))
    ps[4] = [0.02, 0.02, 0.06, 0.9]
    r = _result({"temperature": _vf(auto_t, pt), "salinity": _vf(auto_s, ps)}, b.n_levels)
    t = audit(b, r)
    q = review_queue(t, b)
    assert q["rank"].tolist() == [1, 2]
    # p1: 0.96*3 (salinity) + 0.9*3 (missed) vs p0: 0.9*3 + 0.8*3 (temperature)
    assert q["profile_id"].tolist() == ["p1", "p0"]
    assert q["n_missed_faults"].tolist() == [1, 0]
    assert q["variables"].tolist() == ["salinity;temperature", "temperature"]
    assert q["n_levels"].tolist() == [4, 4]
    s = audit_summary(t, b)
    cru = s[s["group"] == "cruise"].set_index("name")
    assert cru.loc["C1", "n_assessed"] == 8 and cru.loc["C1", "n_disagreements"] == 2
    assert cru.loc["C2", "n_assessed"] == 7  # one temperature level carries no flag
    assert cru.loc["C2", "n_missed_faults"] == 1
    assert cru.loc["C1", "disagreement_rate"] == pytest.approx(2 / 8)
    assert set(s[s["group"] == "operator"]["name"]) == {"Ada", "Bo"}


def test_write_audit_atomic_and_no_overwrite(tmp_path):
    b = _batch([1, 1, 4, 1, 1, 3, NO_FLAG, 2])
    r = _result({"temperature": _vf(np.array([1, 4, 1, 1, 1, 3, 4, 1]))}, b.n_levels)
    t = audit(b, r, variables=("temperature",))
    path = write_audit(t, tmp_path / "a.csv")
    back = pd.read_csv(path)
    assert len(back) == len(t) and list(back.columns) == list(AUDIT_COLUMNS)
    with pytest.raises(OutputExistsError):
        write_audit(t, tmp_path / "a.csv")
    write_audit(t.head(1), tmp_path / "a.csv", overwrite=True)
    assert len(pd.read_csv(path)) == 1
    assert [p.name for p in tmp_path.iterdir()] == ["a.csv"]  # no temporary left behind


def test_audit_ranks_injected_manual_mistakes_of_the_demo_scenario_first():
    # Invented scenario with known truth (qcflag.simulate); rules-only flags so the test
    # stays fast: the model-based figure is measured by bench/measure_heldout.py.
    from qcflag.pipeline import flag_batch
    from qcflag.simulate import simulate_archive

    b = simulate_archive(2, seed=11)
    t = audit(b, flag_batch(b))
    pos = {k: i for i, k in enumerate(zip(b.profiles["cruise"].astype(str),
                                          b.profiles["profile_id"].astype(str), strict=True))}
    prof = np.array([pos[k] for k in zip(t["cruise"], t["profile_id"], strict=True)])
    idx = b.offsets[prof] + t["level"].to_numpy(dtype=np.int64)
    truth = {v: b.extra[f"truth_{v}_grade"].to_numpy() for v in ("temperature", "salinity")}
    manual = {v: b.manual_grade(v)[0] for v in ("temperature", "salinity")}
    wrong = np.array([manual[v][i] != truth[v][i]
                      for v, i in zip(t["variable"], idx, strict=True)])
    assert len(t) > 200
    assert wrong[:100].mean() >= 0.7
    assert wrong[:100].mean() > 2 * wrong.mean()  # far better than the table as a whole
    # per variable, against the scenario's own record of each operator's mistakes
    var = t["variable"].to_numpy()
    for v in ("temperature", "salinity"):
        sel = var == v
        err = b.extra[f"truth_{v}_manual_error"].to_numpy()[idx[sel]]
        assert sel.sum() >= 100
        assert err[:100].mean() >= 0.7, (v, err[:100].mean())
        assert err[:100].mean() > err.mean()
