"""Estimators: scikit-learn's own estimator checks, probability laws, ordinal structure."""

from __future__ import annotations

import re

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from sklearn.ensemble import HistGradientBoostingClassifier
from sklearn.utils.estimator_checks import parametrize_with_checks
from threadpoolctl import threadpool_limits

from qcflag.learn import (
    AlwaysGood,
    CumulativeBoostedClassifier,
    NominalLogistic,
    OrdinalLogistic,
    RulesOnly,
    trees,
)
from qcflag.learn.trees import TreeEnsemble, TreeForest


@pytest.fixture(autouse=True)
def _one_thread():
    # the test machine is shared; oversubscribed BLAS/OpenMP threads only slow things down
    with threadpool_limits(limits=1):
        yield


def _ordinal_data(n=1500, seed=0, p=5, nan_share=0.05):
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n, p))
    latent = X[:, 0] + 0.5 * X[:, 1] + 0.5 * rng.logistic(size=n)
    y = np.digitize(latent, [0.8, 1.5, 2.2]) + 1
    X[rng.random(X.shape) < nan_share] = np.nan
    return X, y


# ---------------------------------------------------------------- sklearn's checks
# classes=None: the checks use labels such as 0/1/2 and strings, not grades 1-4.
_SMALL_BOOST = {"max_iter": 4, "min_samples_leaf": 5}
_CHECKED = [
    OrdinalLogistic(classes=None, max_iter=100),
    OrdinalLogistic("it", classes=None, max_iter=100),
    NominalLogistic(classes=None),
    CumulativeBoostedClassifier(classes=None, **_SMALL_BOOST),
    AlwaysGood(classes=None),
    RulesOnly(column=0, classes=None),
]

_BASELINE_REASON = "baseline by design: ignores the features it is not built on"
_MEDIAN = ("ordinal models predict the median of the grade distribution (it minimises the "
           "absolute grade error), not the argmax of predict_proba, and make_blobs classes "
           "are not ordered along one direction")
_EXPECTED = {
    "OrdinalLogistic": {
        "check_classifiers_train": _MEDIAN,
        "check_classifiers_train(readonly_memmap=True)": _MEDIAN,
        "check_classifiers_train(readonly_memmap=True,X_dtype=float32)": _MEDIAN,
        "check_non_transformer_estimators_n_iter": "mord does not report its iteration count",
    },
    "CumulativeBoostedClassifier": {
        "check_classifiers_train": _MEDIAN,
        "check_classifiers_train(readonly_memmap=True)": _MEDIAN,
        "check_classifiers_train(readonly_memmap=True,X_dtype=float32)": _MEDIAN,
    },
    "RulesOnly": {
        "check_classifiers_classes": _BASELINE_REASON,
        "check_classifiers_train": _BASELINE_REASON,
        "check_classifiers_train(readonly_memmap=True)": _BASELINE_REASON,
        "check_classifiers_train(readonly_memmap=True,X_dtype=float32)": _BASELINE_REASON,
    },
    "AlwaysGood": {
        "check_classifiers_train": _BASELINE_REASON,
        "check_classifiers_train(readonly_memmap=True)": _BASELINE_REASON,
        "check_classifiers_train(readonly_memmap=True,X_dtype=float32)": _BASELINE_REASON,
    },
}


def _expected_failed(est):
    return _EXPECTED.get(type(est).__name__, {})


@parametrize_with_checks(_CHECKED, expected_failed_checks=_expected_failed)
def test_sklearn_compatible(estimator, check):
    check(estimator)


# ---------------------------------------------------------------- probability laws
_GRADE_MODELS = [
    lambda: OrdinalLogistic(max_iter=150),
    lambda: OrdinalLogistic("it", max_iter=150),
    lambda: NominalLogistic(),
    lambda: CumulativeBoostedClassifier(max_iter=6),
    lambda: AlwaysGood(),
    lambda: RulesOnly(column=0),
]


@pytest.mark.parametrize("make", _GRADE_MODELS)
def test_proba_rows_sum_to_one_with_four_grade_columns(make):
    X, y = _ordinal_data()
    est = make().fit(X, y)
    p = est.predict_proba(X)
    assert p.shape == (X.shape[0], 4)
    assert list(est.classes_) == [1, 2, 3, 4]
    np.testing.assert_allclose(p.sum(axis=1), 1.0, atol=1e-12)
    assert (p >= -1e-15).all()
    assert set(np.unique(est.predict(X))) <= {1, 2, 3, 4}


@pytest.mark.parametrize("make", _GRADE_MODELS[:4])
def test_unseen_grade_gets_zero_probability(make):
    X, y = _ordinal_data(seed=1)
    y = np.where(y == 2, 1, y)  # no 'probably good' in training
    est = make().fit(X, y)
    p = est.predict_proba(X)
    assert p.shape[1] == 4
    assert np.all(p[:, 1] == 0.0)
    np.testing.assert_allclose(p.sum(axis=1), 1.0, atol=1e-12)
    assert 2 not in set(est.predict(X))


def test_single_grade_training_predicts_it():
    X, _ = _ordinal_data(n=200)
    for est in (OrdinalLogistic(), NominalLogistic(), CumulativeBoostedClassifier(max_iter=5)):
        est.fit(X, np.full(200, 1))
        np.testing.assert_array_equal(est.predict_proba(X[:3]), [[1, 0, 0, 0]] * 3)


def test_labels_outside_grades_are_refused():
    X, y = _ordinal_data(n=100)
    with pytest.raises(ValueError, match="outside classes"):
        OrdinalLogistic().fit(X, np.where(y == 4, 5, y))


@pytest.fixture(scope="module")
def boosted():
    X, y = _ordinal_data(n=600, seed=7)
    with threadpool_limits(limits=1):
        return CumulativeBoostedClassifier(max_iter=10, min_samples_leaf=5).fit(X, y)


@settings(max_examples=25, deadline=None)
@given(seed=st.integers(0, 10_000), scale=st.floats(0.1, 50.0), nan=st.floats(0.0, 0.5))
def test_boosted_cumulative_probabilities_are_monotone(boosted, seed, scale, nan):
    rng = np.random.default_rng(seed)
    Xt = rng.normal(scale=scale, size=(200, 5))
    Xt[rng.random(Xt.shape) < nan] = np.nan
    gt = boosted.cumulative_proba(Xt)  # P(y > k)
    assert (np.diff(gt, axis=1) <= 0).all()
    p = boosted.predict_proba(Xt)
    assert (p >= 0).all()
    cum_le = np.cumsum(p, axis=1)  # P(y <= k)
    assert (np.diff(cum_le, axis=1) >= -1e-12).all()
    np.testing.assert_allclose(cum_le[:, -1], 1.0, atol=1e-12)


def test_ordinal_logistic_cumulative_probabilities_are_monotone():
    X, y = _ordinal_data()
    est = OrdinalLogistic().fit(X, y)
    assert (np.diff(est.theta_) >= 0).all()
    cum = np.cumsum(est.predict_proba(X * 30), axis=1)
    assert (np.diff(cum, axis=1) >= -1e-12).all()


# ---------------------------------------------------------------- against the libraries
def test_linear_arrays_reproduce_the_fitted_pipeline():
    X, y = _ordinal_data()
    for est in (OrdinalLogistic(), OrdinalLogistic("it"), NominalLogistic()):
        est.fit(X, y)
        # predict_proba uses the compact arrays; the pipeline is mord/sklearn's own
        np.testing.assert_allclose(est.predict_proba(X), est.pipeline_.predict_proba(X),
                                   rtol=1e-10, atol=1e-12)


def test_fused_linear_scores_equal_the_standardised_product(monkeypatch):
    from qcflag.learn import estimators

    X, y = _ordinal_data(n=1000, nan_share=0.2)
    monkeypatch.setattr(estimators, "_BLOCK_LEVELS", 77)  # several blocks, a ragged last one
    for est in (OrdinalLogistic(), NominalLogistic()):
        est.fit(X, y)
        coef = est.coef_ if est.coef_.ndim == 1 else est.coef_.T
        Z = est.pipeline_[:-1].transform(X)
        fused = estimators._linear_scores(X, est.fill_, est.mean_, est.scale_, coef)
        np.testing.assert_allclose(fused, Z @ coef, rtol=0, atol=1e-12)



@pytest.mark.parametrize("chunk", [7, 16_384])
def test_expit_has_the_bits_of_the_two_sided_formula(chunk, monkeypatch):
    def two_sided(x):  # 1 / (1 + exp(-x)) for x >= 0, e / (1 + e) with e = exp(x) elsewhere
        out = np.empty_like(x, dtype=np.float64)
        pos = x >= 0
        out[pos] = 1.0 / (1.0 + np.exp(-x[pos]))
        e = np.exp(x[~pos])
        out[~pos] = e / (1.0 + e)
        return out

    monkeypatch.setattr(trees, "_EXPIT_CHUNK", chunk)  # 7: many chunks, a ragged last one
    rng = np.random.default_rng(0)
    special = np.array([0.0, -0.0, np.nan, -np.nan, np.inf, -np.inf, 5e-324, -5e-324,
                        745.2, -745.2, 709.8, -709.8, 36.7, -36.7])
    for x in (rng.normal(scale=8, size=(7001, 3)), special,
              rng.normal(size=(9, 4))[:, ::3], rng.normal(size=33).astype(np.float32)):
        got, ref = trees.expit(x), two_sided(x)
        assert got.dtype == np.float64 and got.shape == x.shape
        np.testing.assert_array_equal(got.view(np.uint64), ref.view(np.uint64))


def test_ordinal_logistic_probabilities_are_differences_of_the_cumulatives():
    from qcflag.learn import estimators

    X, y = _ordinal_data(n=900, nan_share=0.2)
    est = OrdinalLogistic().fit(X, y)
    eta = estimators._linear_scores(X, est.fill_, est.mean_, est.scale_, est.coef_)
    cum = trees.expit(est.theta_[None, :] - eta[:, None])
    ref = np.diff(np.hstack([np.zeros((X.shape[0], 1)), cum, np.ones((X.shape[0], 1))]),
                  axis=1)
    np.testing.assert_array_equal(est.predict_proba(X), ref)


def test_linear_scores_stop_at_infinite_values(monkeypatch):
    from qcflag.learn import estimators

    X, y = _ordinal_data(n=500)
    est = OrdinalLogistic().fit(X, y)
    monkeypatch.setattr(estimators, "_BLOCK_LEVELS", 77)
    args = (est.fill_, est.mean_, est.scale_, est.coef_)
    np.testing.assert_array_equal(
        estimators._linear_scores(X, *args, check_finite=True),
        estimators._linear_scores(X, *args))
    for row, col, val in ((499, 4, np.inf), (0, 0, -np.inf), (300, 2, np.inf)):
        Xi = X.copy()
        Xi[row, col] = val
        assert estimators._linear_scores(Xi, *args, check_finite=True) is None


@pytest.mark.parametrize("cls", [OrdinalLogistic, NominalLogistic,
                                 CumulativeBoostedClassifier])
def test_prediction_refuses_infinite_values_in_every_column(cls):
    X, y = _ordinal_data(n=600)
    est = cls(**({"max_iter": 5} if cls is CumulativeBoostedClassifier else {})).fit(X, y)
    for col in range(X.shape[1]):
        for val in (np.inf, -np.inf):
            Xi = X[:40].copy()
            Xi[-1, col] = val
            with pytest.raises(ValueError, match="infinity"):
                est.predict_proba(Xi)
    Xi = X[:40].copy()
    Xi[-1] = np.nan  # missing values stay allowed
    assert np.isfinite(est.predict_proba(Xi)).all()


@pytest.mark.parametrize("cls", [OrdinalLogistic, CumulativeBoostedClassifier])
def test_infinite_values_in_a_data_frame_give_only_the_error(cls):
    import warnings

    import pandas as pd

    X, y = _ordinal_data(n=600)
    frame = pd.DataFrame(X, columns=[f"f{j}" for j in range(X.shape[1])])
    est = cls(**({"max_iter": 5} if cls is CumulativeBoostedClassifier else {})).fit(frame, y)
    bad = frame.iloc[:30].copy()
    bad.iloc[-1, 3] = np.inf
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # e.g. no "X does not have valid feature names"
        with pytest.raises(ValueError, match="infinity"):
            est.predict_proba(bad)
        assert est.predict_proba(frame.iloc[:30]).shape == (30, 4)

def test_ordinal_logistic_predict_matches_mord_rule():
    X, y = _ordinal_data()
    est = OrdinalLogistic(max_samples=None).fit(X, y)
    # mord's own prediction: number of thresholds below the latent score
    assert (est.predict(X) == est.pipeline_.predict(X) + 1).mean() > 0.999


def test_max_samples_keeps_rare_grades_and_weights_the_rest():
    X, y = _ordinal_data(n=3000)
    full = OrdinalLogistic(max_samples=None).fit(X, y)
    sub = OrdinalLogistic(max_samples=1500).fit(X, y)
    # an unbiased reweighted subsample gives nearly the same model
    assert np.corrcoef(full.coef_, sub.coef_)[0, 1] > 0.98


def test_tree_arrays_reproduce_hist_gradient_boosting():
    X, y = _ordinal_data(n=800, nan_share=0.1)
    target = (y >= 3).astype(int)
    hgb = HistGradientBoostingClassifier(max_iter=20, early_stopping=False).fit(X, target)
    ens = TreeEnsemble.from_sklearn(hgb)
    ens.validate()
    Xt = X.copy()
    Xt[::5, 2] = np.nan
    ref = hgb.decision_function(Xt)
    np.testing.assert_allclose(ens.raw(Xt), ref, rtol=0, atol=1e-12)
    np.testing.assert_allclose(ens.raw_numpy(Xt), ref, rtol=0, atol=1e-12)
    # path attributions add up to the raw score minus the expected output
    c = ens.contributions(Xt)
    roots = ens.nodes["mean_value"][ens.tree_offsets[:-1]].sum()
    np.testing.assert_allclose(c.sum(axis=1), ref - ens.baseline - roots, atol=1e-9)


def test_forest_codes_give_bit_identical_scores_in_blocks_and_threads(monkeypatch):
    X, y = _ordinal_data(n=800, nan_share=0.1)
    models = [HistGradientBoostingClassifier(max_iter=15, early_stopping=False, random_state=k)
              .fit(X, (y > k).astype(int)) for k in (1, 2)]
    ens = [TreeEnsemble.from_sklearn(m) for m in models]
    # values exactly on split thresholds, just above them, infinities and NaN
    thr = ens[0].nodes["threshold"][~ens[0].nodes["is_leaf"]]
    feat = ens[0].nodes["feature"][~ens[0].nodes["is_leaf"]]
    Xt = np.repeat(X[:40], 3, axis=0)
    rows = np.arange(40)
    Xt[rows, feat[:40]] = thr[:40]
    Xt[rows + 40, feat[:40]] = np.nextafter(thr[:40], np.inf)
    Xt[80:90, 1] = np.inf
    Xt[90:100, 0] = -np.inf
    Xt[100:110] = np.nan
    Xt = np.vstack([Xt, X])
    monkeypatch.setattr(trees, "BLOCK_LEVELS", 97)  # many blocks, a ragged last one
    forest = TreeForest(ens)
    assert forest.binned
    for nt in (1, 2):
        raw = forest.raw(Xt, n_threads=nt)
        for k, m in enumerate(models):
            np.testing.assert_array_equal(raw[:, k], m.decision_function(Xt))
    np.testing.assert_allclose(ens[1].raw_numpy(Xt), raw[:, 1], rtol=0, atol=1e-12)


def test_boosted_thresholds_match_separate_hgb_models():
    X, y = _ordinal_data(n=600)
    est = CumulativeBoostedClassifier(max_iter=5, class_weight=None).fit(X, y)
    for k, ens in enumerate(est.ensembles_, start=1):
        hgb = HistGradientBoostingClassifier(max_iter=5, early_stopping=False,
                                             random_state=0).fit(X, (y > k).astype(int))
        np.testing.assert_allclose(ens.raw(X), hgb.decision_function(X), atol=1e-12)


def test_all_nan_column_is_tolerated_by_boosting():
    X, y = _ordinal_data(n=300)
    X[:, 2] = np.nan
    est = CumulativeBoostedClassifier(max_iter=5).fit(X, y)
    assert est.predict_proba(X).shape == (300, 4)
    assert not np.any(np.concatenate([e.nodes["feature"][~e.nodes["is_leaf"]]
                                      for e in est.ensembles_]) == 2)


def test_class_weight_raises_rare_grade_recall():
    X, y = _ordinal_data(n=3000, seed=3)
    none = NominalLogistic(class_weight=None).fit(X, y)
    bal = NominalLogistic(class_weight="balanced").fit(X, y)
    rec = [np.mean(m.predict(X)[y == 4] == 4) for m in (none, bal)]
    assert rec[1] > rec[0]


def test_contributions_shapes_and_linear_identity():
    X, y = _ordinal_data()
    est = OrdinalLogistic().fit(X, y)
    c = est.contributions(X)
    assert c.shape == X.shape
    Z = est.pipeline_[:-1].transform(X)
    np.testing.assert_allclose(c.sum(axis=1), Z @ est.coef_, atol=1e-10)


@pytest.mark.parametrize("cls", [AlwaysGood, RulesOnly, OrdinalLogistic, NominalLogistic,
                                 CumulativeBoostedClassifier])
def test_fitted_attributes_are_documented(cls):
    X, y = _ordinal_data(n=300)
    kwargs = {"column": 0} if cls is RulesOnly else {}
    if cls is CumulativeBoostedClassifier:
        kwargs = {"max_iter": 3}
    est = cls(**kwargs).fit(X, y)
    fitted = {k for k in vars(est) if k.endswith("_") and not k.startswith("_")}
    doc = cls.__doc__.split("Attributes")[1]
    heads = re.findall(r"^ {4}(\w+(?:, \w+)*) :", doc, flags=re.M)
    names = {n for h in heads for n in h.split(", ")}
    assert fitted <= names, fitted - names
