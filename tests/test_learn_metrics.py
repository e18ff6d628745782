"""Metrics checked against scikit-learn's own metric functions on small hand-made cases."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from sklearn import metrics as skm

from qcflag.learn import metrics as m

# A small hand-made case: 12 levels, all four grades, some confusions both ways.
Y_TRUE = np.array([1, 1, 1, 1, 1, 2, 2, 3, 3, 4, 4, 1])
Y_PRED = np.array([1, 1, 2, 1, 3, 2, 1, 3, 4, 4, 3, 1])
SCORE = np.array([0.1, 0.2, 0.35, 0.1, 0.7, 0.3, 0.2, 0.8, 0.9, 0.95, 0.7, 0.05])


def test_confusion_matches_sklearn():
    # sklearn.metrics.confusion_matrix: rows true, columns predicted
    np.testing.assert_array_equal(
        m.confusion(Y_TRUE, Y_PRED), skm.confusion_matrix(Y_TRUE, Y_PRED, labels=[1, 2, 3, 4]))


def test_per_grade_prf_matches_sklearn():
    prf = m.per_grade_prf(m.confusion(Y_TRUE, Y_PRED))
    p, r, f, s = skm.precision_recall_fscore_support(
        Y_TRUE, Y_PRED, labels=[1, 2, 3, 4], zero_division=0)
    np.testing.assert_allclose(prf["precision"], p)
    np.testing.assert_allclose(prf["recall"], r)
    np.testing.assert_allclose(prf["f1"], f)
    np.testing.assert_array_equal(prf["support"], s)


def test_prf_zero_division_when_a_grade_is_never_predicted():
    yt, yp = np.array([1, 2, 2, 4]), np.array([1, 1, 1, 4])
    prf = m.per_grade_prf(m.confusion(yt, yp))
    p, _r, f, _ = skm.precision_recall_fscore_support(yt, yp, labels=[1, 2, 3, 4],
                                                     zero_division=0)
    np.testing.assert_allclose(prf["precision"], p)
    np.testing.assert_allclose(prf["f1"], f)


def test_mae_matches_sklearn():
    assert m.mean_absolute_grade_error(Y_TRUE, Y_PRED) == pytest.approx(
        skm.mean_absolute_error(Y_TRUE, Y_PRED))


def test_qwk_matches_sklearn():
    cm = m.confusion(Y_TRUE, Y_PRED)
    assert m.quadratic_weighted_kappa(cm) == pytest.approx(
        skm.cohen_kappa_score(Y_TRUE, Y_PRED, weights="quadratic"))


def test_qwk_perfect_and_constant():
    assert m.quadratic_weighted_kappa(m.confusion(Y_TRUE, Y_TRUE)) == pytest.approx(1.0)
    # one grade everywhere in both: kappa undefined (sklearn returns nan as well)
    assert np.isnan(m.quadratic_weighted_kappa(m.confusion([1, 1], [1, 1])))


def test_roc_auc_with_ties_matches_sklearn():
    pos = Y_TRUE >= 3
    assert m.roc_auc(pos, SCORE) == pytest.approx(skm.roc_auc_score(pos, SCORE))


def test_average_precision_with_ties_matches_sklearn():
    pos = Y_TRUE >= 3
    assert m.average_precision(pos, SCORE) == pytest.approx(
        skm.average_precision_score(pos, SCORE))


def test_recall_at_false_alarm_matches_roc_curve():
    pos = Y_TRUE >= 3
    fpr, tpr, _ = skm.roc_curve(pos, SCORE, drop_intermediate=False)
    for rate in (0.0, 0.1, 0.125, 0.25, 0.5, 1.0):
        assert m.recall_at_false_alarm(pos, SCORE, rate) == pytest.approx(
            tpr[fpr <= rate].max()), rate


def test_one_class_gives_nan():
    assert np.isnan(m.roc_auc(np.zeros(5, bool), np.arange(5.0)))
    assert np.isnan(m.average_precision(np.zeros(5, bool), np.arange(5.0)))
    assert np.isnan(m.recall_at_false_alarm(np.ones(5, bool), np.arange(5.0)))


def test_flag_rates_by_hand():
    # flagged truth: levels 7-10 (grades 3,3,4,4); predicted >=3 for 4 of them -> 4/4
    # unflagged truth: 8 levels, predicted >=3 once (level 4) -> 1/8
    recall_bad, far = m.flag_rates(m.confusion(Y_TRUE, Y_PRED))
    assert recall_bad == pytest.approx(4 / 4)
    assert far == pytest.approx(1 / 8)


def test_score_grades_is_consistent():
    proba = np.column_stack([1 - SCORE, np.zeros(12), SCORE / 2, SCORE / 2])
    out = m.score_grades(Y_TRUE, proba, Y_PRED)
    assert out["confusion"] == skm.confusion_matrix(Y_TRUE, Y_PRED, labels=[1, 2, 3, 4]).tolist()
    assert out["roc_auc"] == pytest.approx(skm.roc_auc_score(Y_TRUE >= 3, SCORE))
    assert out["f1_3"] == pytest.approx(
        skm.f1_score(Y_TRUE, Y_PRED, labels=[3], average=None, zero_division=0)[0])


@settings(max_examples=60, deadline=None)
@given(data=st.data())
def test_random_cases_match_sklearn(data):
    n = data.draw(st.integers(2, 40))
    yt = np.array(data.draw(st.lists(st.integers(1, 4), min_size=n, max_size=n)))
    yp = np.array(data.draw(st.lists(st.integers(1, 4), min_size=n, max_size=n)))
    # coarse scores force ties
    s = np.array(data.draw(st.lists(st.integers(0, 5), min_size=n, max_size=n))) / 5.0
    cm = m.confusion(yt, yp)
    if len(np.unique(np.concatenate([yt, yp]))) > 1:
        # the four grades are the label set: quadratic weights follow grade distance even
        # when a grade is absent (sklearn otherwise weights by index among present labels)
        ref = skm.cohen_kappa_score(yt, yp, weights="quadratic", labels=[1, 2, 3, 4])
        got = m.quadratic_weighted_kappa(cm)
        assert (np.isnan(ref) and np.isnan(got)) or got == pytest.approx(ref)
    pos = yt >= 3
    if pos.any() and (~pos).any():
        assert m.roc_auc(pos, s) == pytest.approx(skm.roc_auc_score(pos, s))
        assert m.average_precision(pos, s) == pytest.approx(skm.average_precision_score(pos, s))
        fpr, tpr, _ = skm.roc_curve(pos, s, drop_intermediate=False)
        assert m.recall_at_false_alarm(pos, s, 0.2) == pytest.approx(tpr[fpr <= 0.2].max())
