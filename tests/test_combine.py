from __future__ import annotations

import json

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays

from qcflag.checks.base import CheckResult, CheckTable
from qcflag.combine import (
    DEFAULT_COST,
    FORCING,
    DecisionError,
    FusionParams,
    choose_threshold,
    combine,
    decide,
    fit_fusion,
    fuse,
    reliability_curve,
)
from qcflag.schemes import State

VAR = "temperature"


def _table(grades: dict[str, np.ndarray]) -> CheckTable:
    n = len(next(iter(grades.values())))
    return CheckTable(
        {(name, VAR): CheckResult(np.zeros(n), np.asarray(g, dtype=np.int8))
         for name, g in grades.items()},
        n,
    )


def _dirichlet(rng: np.random.Generator, n: int) -> np.ndarray:
    return rng.dirichlet(np.ones(4), size=n)


probas = st.integers(1, 40).flatmap(
    lambda n: arrays(np.float64, (n, 4), elements=st.floats(0.0, 1.0)).map(
        lambda a: (a + 1e-9) / (a + 1e-9).sum(axis=1, keepdims=True)
    )
)


# ------------------------------------------------------------------- forced grades
@settings(max_examples=60, deadline=None)
@given(
    data=st.data(),
    proba=probas,
)
def test_forced_grades_always_win(data, proba):
    n = proba.shape[0]
    rng_grades = st.lists(st.sampled_from([0, 1, 3, 4]), min_size=n, max_size=n)
    glob = np.array(data.draw(rng_grades), dtype=np.int8)
    spike = np.array(data.draw(rng_grades), dtype=np.int8)
    caution = data.draw(st.floats(0.0, 3.0))
    checks = _table({"global_range": glob, "spike": spike})
    out = combine(checks, VAR, proba, caution=caution)
    forced = glob >= 3
    np.testing.assert_array_equal(out.forced, forced)
    assert (out.grade[forced] >= glob[forced]).all()
    np.testing.assert_array_equal(out.confidence[forced], 1.0)
    # the model is ignored on forced levels: its probabilities put mass 1 on the flag
    np.testing.assert_allclose(out.proba[forced].max(axis=1), 1.0)
    assert all("global_range" in r.split(";") for r in out.reasons[forced])


def test_forcing_set_is_the_impossible_values():
    # Argo real-time tests 2, 3, 4, 6, 8, 13 (ARGO-QC §2.1.2 via ../shared/reference/
    # qc-standards.md §1.3): impossible date/position, on land, global range, pressure not
    # increasing, whole profile stuck. Spike and density inversion are evidence, not forcing.
    assert {"global_range", "pressure_increasing", "on_land", "position", "date"} <= FORCING
    assert not {"spike", "density_inversion", "climatology", "gradient"} & FORCING


def test_forced_grade_beats_a_confident_model():
    proba = np.tile([0.999, 0.001, 0.0, 0.0], (3, 1))
    checks = _table({"pressure_increasing": np.array([4, 1, 0]), "spike": np.array([1, 4, 1])})
    out = combine(checks, VAR, proba)
    assert out.grade.tolist() == [4, 1, 1]  # spike is evidence; the model outweighs it
    assert out.reasons[0] == "pressure_increasing"
    assert out.reasons[1] == "spike"


# ------------------------------------------------------------------- probabilities
def _synthetic_oof(n: int, seed: int):
    """Invented scenario: a noisy model plus one informative and one useless rule."""
    rng = np.random.default_rng(seed)
    y = rng.choice([1, 2, 3, 4], size=n, p=[0.9, 0.04, 0.03, 0.03])
    bad = y >= 3
    logits = np.where(bad[:, None], [0.0, 0.5, 1.5, 1.5], [2.0, 0.5, 0.0, 0.0])
    logits = logits + rng.normal(0, 1.2, size=(n, 4))
    proba = np.exp(logits) / np.exp(logits).sum(axis=1, keepdims=True)
    informative = np.where(bad & (rng.random(n) < 0.7), 4, 1)
    informative = np.where(~bad & (rng.random(n) < 0.01), 4, informative)
    useless = np.where(rng.random(n) < 0.05, 3, 1)
    checks = _table({"spike": informative, "flat_line": useless,
                     "global_range": np.ones(n)})
    return y, proba, checks


def test_fused_probabilities_sum_to_one_and_rules_get_sensible_weights():
    y, proba, checks = _synthetic_oof(20_000, 1)
    fusion = fit_fusion(y, proba, checks, VAR)
    assert "global_range" not in fusion.rules  # forcing checks are not fused
    fused = fuse(checks, VAR, proba, fusion)
    np.testing.assert_allclose(fused.sum(axis=1), 1.0, atol=1e-12)
    assert (fused >= 0).all()
    # the informative rule carries weight, a firing of it raises P(>=3)
    spike_llr = np.array(fusion.rules["spike"]["llr"])
    assert spike_llr[3, 2] > 1.0 and spike_llr[3, 0] < -1.0
    assert fusion.rules["spike"]["weight"] > 0.3
    # a rule independent of the grade has a likelihood ratio near 1 (log near 0)
    assert np.abs(np.array(fusion.rules["flat_line"]["llr"])[2]).max() < 0.3


def test_fusion_improves_log_loss_and_is_calibrated():
    y, proba, checks = _synthetic_oof(20_000, 2)
    fusion = fit_fusion(y, proba, checks, VAR)
    y2, proba2, checks2 = _synthetic_oof(20_000, 3)  # fresh data of the same scenario
    fused = fuse(checks2, VAR, proba2, fusion)

    def logloss(p):
        return -np.mean(np.log(p[np.arange(y2.size), y2 - 1]))

    assert logloss(fused) < logloss(proba2) - 0.05
    curve = reliability_curve(y2 >= 3, fused[:, 2:].sum(axis=1), n_bins=5)
    big = curve[curve["n"] >= 200]
    assert (np.abs(big["observed"] - big["mean_predicted"]) < 0.08).all()


def test_fusion_params_roundtrip_json():
    y, proba, checks = _synthetic_oof(5_000, 4)
    fusion = fit_fusion(y, proba, checks, VAR)
    back = FusionParams.from_dict(json.loads(json.dumps(fusion.to_dict())))
    np.testing.assert_allclose(fuse(checks, VAR, proba, back), fuse(checks, VAR, proba, fusion))


def test_reliability_curve_counts():
    curve = reliability_curve([0, 1, 1, 0], [0.05, 0.95, 0.85, 0.15], n_bins=2)
    assert curve["n"].tolist() == [2, 2]
    assert curve["observed"].tolist() == [0.0, 1.0]
    np.testing.assert_allclose(curve["mean_predicted"], [0.1, 0.9])


# ------------------------------------------------------------------------ decision
@settings(max_examples=200, deadline=None)
@given(proba=probas, c1=st.floats(0.0, 5.0), c2=st.floats(0.0, 5.0))
def test_raising_caution_never_lowers_a_flag(proba, c1, c2):
    lo, hi = sorted((c1, c2))
    assert (decide(proba, caution=hi) >= decide(proba, caution=lo)).all()
    checks = _table({"spike": np.ones(proba.shape[0])})
    a = combine(checks, VAR, proba, caution=lo).grade
    b = combine(checks, VAR, proba, caution=hi).grade
    assert (b >= a).all()


@settings(max_examples=200, deadline=None)
@given(proba=probas)
def test_default_cost_decision_is_the_boundary_rule(proba):
    # derived from the additive cost matrix: grade = 1 + #{k : P(grade > k) > a/(a+b)}
    exceed = np.stack([proba[:, 1:].sum(1), proba[:, 2:].sum(1), proba[:, 3]], axis=1)
    tau = np.array([0.25, 0.25, 0.5])
    clear = np.abs(exceed - tau).min(axis=1) > 1e-9  # skip exact ties
    expected = 1 + (exceed > tau).sum(axis=1)
    got = decide(proba)
    np.testing.assert_array_equal(got[clear], expected[clear])
    # and it is the minimum of the expected cost
    ec = proba @ DEFAULT_COST
    chosen = ec[np.arange(len(got)), got - 1]
    assert (chosen <= ec.min(axis=1) + 1e-9).all()


def test_threshold_decision():
    p = np.array([[0.6, 0.1, 0.2, 0.1], [0.6, 0.2, 0.05, 0.15], [0.1, 0.1, 0.2, 0.6]])
    g = decide(p, threshold=0.3)
    assert g[0] == 3  # P(>=3) = 0.3 reaches the threshold; P(4 | >=3) = 1/3 -> 3
    assert g[1] <= 2
    assert g[2] == 4
    with pytest.raises(DecisionError):
        decide(p, caution=-1.0)


@settings(max_examples=100, deadline=None)
@given(
    p=arrays(np.float64, st.integers(1, 200), elements=st.floats(0, 1)),
    data=st.data(),
    r=st.floats(0.0, 1.0),
)
def test_choose_threshold_meets_recall_and_budget(p, data, r):
    y = np.array(data.draw(st.lists(st.booleans(), min_size=p.size, max_size=p.size)))
    t = choose_threshold(p, y, target_recall=r)
    if y.any():
        recall = (p[y] >= t).mean()
        assert recall >= r - 1e-12
        # highest such threshold: any higher value among the positives misses the target
        higher = p[y][p[y] > t]
        if higher.size:
            assert (p[y] >= higher.min()).mean() < r or higher.min() == t
    b = choose_threshold(p, review_budget=r)
    assert (p >= b).mean() <= r + 1e-12


def test_choose_threshold_needs_one_setting():
    with pytest.raises(DecisionError):
        choose_threshold([0.1], target_recall=0.9, review_budget=0.1)
    with pytest.raises(DecisionError):
        choose_threshold([0.1], target_recall=0.9)
    with pytest.raises(DecisionError):
        choose_threshold([0.1], review_budget=1.5)


# ------------------------------------------------------------------ rules-only, missing
def test_rules_only_and_missing_values():
    checks = _table({
        "global_range": np.array([1, 4, 1, 1, 1]),
        "spike": np.array([1, 1, 4, 1, 1]),
        "density_inversion": np.array([1, 1, 4, 1, 0]),
    })
    values = np.array([10.0, 50.0, 12.0, 11.0, np.nan])
    out = combine(checks, VAR, None, values=values)
    assert out.grade.tolist() == [1, 4, 4, 1, 0]
    assert out.state[4] == State.MISSING and out.state[:4].tolist() == [State.ASSESSED] * 4
    assert out.proba is None
    assert out.confidence[1] == 1.0  # forced
    assert out.confidence[2] == pytest.approx(0.75)  # two checks fired: 1 - 2**-2
    assert out.confidence[0] == pytest.approx(4 / 5)  # three passed: (3 + 1) / (3 + 2)
    assert np.isnan(out.confidence[4])
    assert out.reasons.tolist() == ["", "global_range", "spike;density_inversion", "", ""]


def test_model_reasons_from_attribution():
    proba = np.array([[0.05, 0.05, 0.3, 0.6], [0.9, 0.05, 0.03, 0.02]])
    checks = _table({"spike": np.array([4, 1])})
    contrib = np.array([[0.1, 2.0, -1.0], [3.0, 0.0, 0.0]])
    out = combine(checks, VAR, proba, attribution=(["a", "b", "c"], contrib))
    assert out.reasons[0] == "spike;model:b;model:a"
    assert out.reasons[1] == ""  # passed: no model reason


def test_explain_matches_combine_with_attribution():
    from qcflag.combine import explain

    rng = np.random.default_rng(5)
    proba = _dirichlet(rng, 50)
    checks = _table({"spike": rng.choice([1, 4], 50), "global_range": rng.choice([1, 4], 50,
                                                                                 p=[0.9, 0.1])})
    contrib = rng.normal(size=(50, 3))
    names = ["x", "y", "z"]
    direct = combine(checks, VAR, proba, attribution=(names, contrib))
    later = explain(combine(checks, VAR, proba), checks, VAR, (names, contrib))
    np.testing.assert_array_equal(direct.reasons, later.reasons)
    np.testing.assert_array_equal(direct.grade, later.grade)
    assert any("model:" in r for r in later.reasons)


def test_not_applicable_verdict_is_no_evidence():
    # a check that did not apply (verdict 0) says nothing about the grade, even when the
    # levels where it did not apply happen to be mostly bad in the fitting data
    rng = np.random.default_rng(5)
    n = 5000
    y = np.where(rng.random(n) < 0.1, 3, 1)
    proba = np.tile([0.85, 0.05, 0.05, 0.05], (n, 1))
    na_when_bad = np.where((y == 3) & (rng.random(n) < 0.8), 0, 1)
    fusion = fit_fusion(y, proba, _table({"density_inversion": na_when_bad}), VAR)
    np.testing.assert_array_equal(np.array(fusion.rules["density_inversion"]["llr"])[0], 0.0)


def test_forced_levels_are_left_out_of_the_fusion_fit():
    y, proba, checks = _synthetic_oof(6000, 4)
    n = y.size
    forced = np.zeros(n, dtype=bool)
    forced[:500] = True  # a block decided by a forcing check, manual 3, model says good
    y2 = np.where(forced, 3, y)
    p2 = np.where(forced[:, None], [0.97, 0.01, 0.01, 0.01], proba)
    grades = {name: checks.results[(name, VAR)].grade for name, _ in checks.results}
    grades["global_range"] = np.where(forced, 4, 1)
    with_block = fit_fusion(y2, p2, _table(grades), VAR)
    keep = np.where(forced, 0, y)  # the same fit without those levels
    without = fit_fusion(keep, proba, checks, VAR)
    assert with_block.n_levels == without.n_levels == n - 500
    assert with_block.model_weight == pytest.approx(without.model_weight, rel=1e-6)
    assert with_block.model_weight > 0.3


def test_target_recall_quantiles_discount_the_operators_false_flags():
    # generated scenario: truly bad levels score high, truly good ones low; 12 % of the
    # manually flagged levels are an operator's false flags drawn from the good levels
    from qcflag.combine import _denoised_bad_quantiles

    rng = np.random.default_rng(5)
    good = rng.beta(1.0, 60.0, 200_000)
    bad = rng.beta(12.0, 2.0, 4_000)
    false_flags = rng.beta(1.0, 60.0, 545)  # 545 / (4000 + 545) = 12 %
    flagged = np.concatenate([bad, false_flags])
    qs = np.linspace(0, 1, 1001)
    eps, q = _denoised_bad_quantiles(flagged, good, qs)
    assert eps == pytest.approx(0.12, abs=0.02)
    t = float(np.interp(0.05, qs, q))  # threshold for a 95 % recall
    assert (bad >= t).mean() == pytest.approx(0.95, abs=0.015)
    assert (good >= t).mean() < 0.001
    raw = np.quantile(flagged, 0.05)  # the plain quantile reaches into the good levels
    assert (bad >= raw).mean() > 0.999 and (good >= raw).mean() > 0.3
    # clean labels: nothing to discount, the plain quantiles come back
    eps0, q0 = _denoised_bad_quantiles(bad, good, qs)
    assert eps0 < 0.01
    assert float(np.interp(0.05, qs, q0)) == pytest.approx(np.quantile(bad, 0.05), abs=0.01)


def test_costly_target_recall_warns_with_the_share_it_flags():
    import warnings

    from qcflag.combine import DecisionWarning
    from qcflag.pipeline import _decision_threshold

    qs = np.linspace(0, 1, 1001)
    fp = FusionParams(variable=VAR,
                      # bad levels: 10 % of them look like good ones (p = 0.01)
                      bad_quantiles=list(np.where(qs < 0.1, 0.01, 0.9)),
                      # all levels: 97 % spread over 0 .. 0.02, the rest high
                      all_quantiles=list(np.where(qs < 0.97, 0.02 * qs, 0.9)))
    assert fp.flagged_share(0.9) == pytest.approx(0.03, abs=0.002)
    assert fp.flagged_share(0.01) == pytest.approx(0.5, abs=0.002)
    with pytest.warns(DecisionWarning, match=r"temperature: a target recall of 0.95 needs .* "
                                             r"which flagged 50% of the training levels"):
        t = _decision_threshold(fp, VAR, 0.95, None)
    assert t == pytest.approx(0.01)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        assert _decision_threshold(fp, VAR, 0.85, None) == pytest.approx(0.9)  # no warning


def test_a_check_that_never_fired_in_training_is_taken_at_its_word():
    # generated scenario: the training archive never shows a density inversion, so the
    # fusion cannot weigh that check from data; where it fires later, the flag follows the
    # published rule even though the model (never having seen one) says good
    y, proba, checks = _synthetic_oof(20_000, 6)
    never = np.ones(y.size, dtype=np.int8)
    tables = dict(checks.results)
    tables[("density_inversion", VAR)] = CheckResult(np.zeros(y.size), never)
    fusion = fit_fusion(y, proba, CheckTable(tables, y.size), VAR)
    assert fusion.rules["density_inversion"]["weight"] == 1.0
    assert 0.0 <= fusion.rules["flat_line"]["weight"] < 1.0  # fired, weighed by the data
    llr = np.array(fusion.rules["density_inversion"]["llr"])
    assert llr[3, 3] - llr[3, 0] > 5.0  # a fail verdict: strong evidence for grade 4
    assert abs(llr[1]).max() < 0.05  # a pass verdict: next to none
    good_model = np.tile([0.97, 0.01, 0.01, 0.01], (3, 1))
    verdict = np.array([1, 4, 4], dtype=np.int8)
    later = CheckTable({("spike", VAR): CheckResult(np.zeros(3), np.ones(3, np.int8)),
                        ("flat_line", VAR): CheckResult(np.zeros(3), np.ones(3, np.int8)),
                        ("density_inversion", VAR): CheckResult(np.zeros(3), verdict)}, 3)
    grade = combine(later, VAR, good_model, fusion=fusion).grade
    assert grade[0] <= 2 and (grade[1:] >= 3).all()


def test_false_alarm_rate_threshold_from_the_passed_levels():
    # generated scenario: passed levels spread over 0 .. 0.1, a few at exactly 0.1 (a
    # plateau of the isotonic map); a 1 % rate must not flag the plateau's ties
    qs = np.linspace(0, 1, 1001)
    fp = FusionParams(variable=VAR, pass_quantiles=list(np.minimum(0.1 * qs / 0.99, 0.1)))
    t = fp.threshold_for_false_alarms(0.01)
    assert t > 0.1 and t == pytest.approx(0.1)
    p = np.array([[0.5, 0.4, 0.05, 0.05], [0.5, 0.3, 0.1, 0.1], [0.2, 0.2, 0.3, 0.3]])
    g = decide(p, threshold=t)
    assert g[0] <= 2 and g[1] >= 3 and g[2] >= 3  # P(>=3): 0.1 (a tie) passes, 0.2, 0.6 flag
    t2 = fp.threshold_for_false_alarms(0.5)
    assert t2 == pytest.approx(0.1 * 0.5 / 0.99, rel=1e-3)
    assert fp.threshold_for_false_alarms(0.0) == np.inf
    with pytest.raises(DecisionError):
        FusionParams(variable=VAR).threshold_for_false_alarms(0.01)  # no validation data
    with pytest.raises(DecisionError):
        fp.threshold_for_false_alarms(1.5)


def test_fit_fusion_stores_the_passed_levels_quantiles():
    y, proba, checks = _synthetic_oof(20_000, 7)
    fusion = fit_fusion(y, proba, checks, VAR)
    p_bad = fuse(checks, VAR, proba, fusion)[:, 2:].sum(axis=1)
    passed = y <= 2
    t = fusion.threshold_for_false_alarms(0.02)
    assert (p_bad[passed] >= t).mean() == pytest.approx(0.02, abs=0.005)
    assert (p_bad[~passed] >= t).mean() > (p_bad[passed] >= t).mean() * 10
