"""Boosted oblivious trees: evaluators, bins, NaN side, fitting, estimator API, model files.

The evaluators (numba kernels in both loop orders, numpy) are checked bit for bit against a
straightforward per-level walk written here; the fitting kernels against their numpy twins.
What the model learns is checked on generated data with a known nonlinear rule (invented
data, as the contributor guide allows for such checks).
"""

from __future__ import annotations

import io
import json
import math
import pickle
import re
import subprocess
import sys
import zipfile

import numpy as np
import pytest
from sklearn.utils.estimator_checks import parametrize_with_checks
from threadpoolctl import threadpool_limits

from qcflag.exceptions import ModelFileError
from qcflag.learn import (
    CumulativeObliviousClassifier,
    QCModel,
    load_model,
    make_estimator,
    oblivious,
    save_model,
)
from qcflag.learn.oblivious import (
    MISSING_CODE,
    ObliviousEnsemble,
    ObliviousForest,
    bin_codes,
    bin_edges,
    fit_oblivious,
)


@pytest.fixture(autouse=True)
def _one_thread():
    # the test machine is shared; oversubscribed BLAS threads only slow things down
    with threadpool_limits(limits=1):
        yield


@pytest.fixture(params=["numba", "numpy"])
def kernels(request, monkeypatch):
    """Force the numba kernels or the numpy twins; the chosen one must really run."""
    monkeypatch.setattr(oblivious, "_kernels", {})
    if request.param == "numba":
        pytest.importorskip("numba")
        monkeypatch.setattr(oblivious, "USE_NUMBA", True)
        assert oblivious._kernel("predict_block") is not None
    else:
        monkeypatch.setattr(oblivious, "USE_NUMBA", False)
        assert oblivious._kernel("predict_block") is None
    return request.param


def _rule_data(n=3000, seed=0, p=6, nan_share=0.05):
    """Grades from a nonlinear rule: distance from the origin in (x0, x1) and a sign product."""
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n, p))
    r = np.hypot(X[:, 0], X[:, 1]) + 0.6 * (X[:, 2] * X[:, 3] > 0)
    y = np.digitize(r + 0.15 * rng.logistic(size=n), [1.2, 1.9, 2.5]) + 1
    X[rng.random(X.shape) < nan_share] = np.nan
    return X, y


def _reference_raw(ens: ObliviousEnsemble, X: np.ndarray) -> np.ndarray:
    """Walk every level through every tree one comparison at a time (plain Python)."""
    out = np.empty(X.shape[0])
    for i in range(X.shape[0]):
        s = ens.baseline
        for t in range(ens.n_trees):
            leaf = 0
            for k in range(ens.depth):
                x = float(X[i, ens.features[t, k]])
                thr = float(ens.thresholds[t, k])
                if math.isnan(x) or math.isnan(thr) or x > thr:  # NaN: the greater side
                    leaf += 1 << k
            s += ens.leaf_values[t, leaf]
        out[i] = s
    return out


@pytest.fixture(scope="module")
def fitted():
    X, y = _rule_data(n=2500, seed=3)
    with threadpool_limits(limits=1):
        est = CumulativeObliviousClassifier(n_trees=25, depth=4).fit(X, y)
    return est, X, y


# ------------------------------------------------------------------- scikit-learn's checks
_MEDIAN = ("ordinal models predict the median of the grade distribution (it minimises the "
           "absolute grade error), not the argmax of predict_proba, and make_blobs classes "
           "are not ordered along one direction")
_EXPECTED = {
    "check_classifiers_train": _MEDIAN,
    "check_classifiers_train(readonly_memmap=True)": _MEDIAN,
    "check_classifiers_train(readonly_memmap=True,X_dtype=float32)": _MEDIAN,
}


@parametrize_with_checks(
    [CumulativeObliviousClassifier(classes=None, n_trees=5, depth=3)],
    expected_failed_checks=lambda est: _EXPECTED,
)
def test_sklearn_compatible(estimator, check):
    check(estimator)


# ------------------------------------------------------------------------- evaluators
@pytest.mark.parametrize("n_threads", [1, 2])
@pytest.mark.parametrize("kernel", ["auto", "codes", "block", "rows"])
def test_evaluators_equal_a_per_level_reference_walk(fitted, kernels, kernel, n_threads,
                                                     monkeypatch):
    est, X, _ = fitted
    rows = np.vstack([X[:300], np.full((3, X.shape[1]), np.nan)])
    e0 = est.ensembles_[0]
    # levels exactly on split thresholds and one step above them
    on = np.repeat(X[:40], 2, axis=0)
    finite = np.isfinite(e0.thresholds.ravel())
    f, t = e0.features.ravel()[finite][:40], e0.thresholds.ravel()[finite][:40]
    on[np.arange(f.size), f] = t
    on[f.size + np.arange(f.size), f] = np.nextafter(t, np.inf)
    rows = np.vstack([rows, on])
    monkeypatch.setattr(oblivious, "BLOCK_LEVELS", 97)  # many blocks, a ragged last one
    raw = ObliviousForest(est.ensembles_).raw(rows, kernel=kernel, n_threads=n_threads)
    for k, e in enumerate(est.ensembles_):
        np.testing.assert_array_equal(raw[:, k], _reference_raw(e, rows))
    assert ObliviousForest(est.ensembles_).raw(rows[:0]).shape == (0, 3)



def _crafted_forest(depth, n_splits=400, p=5, seed=0):
    """Three ensembles with awkward thresholds: column 0 has over 64 distinct ones (binary
    search), column 1 at most 64 (counting), column 3 exactly 65, column 2 NaN ("no
    split"), +-inf, -0.0 beside 0.0; tree counts leave ragged groups of four trees."""
    rng = np.random.default_rng(seed)
    n_trees = -(-n_splits // depth)
    sizes = (n_trees // 2 + 1, n_trees - n_trees // 2 - 1, 1)
    s = np.arange(sum(sizes) * depth)
    col = np.array([0, 0, 1, 3, 2])[s % 5]
    col[(s % 5 == 4) & (s // 5 % 2 == 1)] = 4
    pools = {0: rng.normal(size=300), 1: np.round(rng.normal(size=64), 1),
             2: np.array([-0.0, 0.0, 1.5, np.inf, -np.inf, np.nan]), 3: rng.normal(size=65),
             4: np.array([2.0])}
    idx = np.where(col == 2, s // 10, s // 5)  # column 2 takes every other fifth split
    thr = np.array([pools[c][i % pools[c].size] for c, i in zip(col, idx, strict=True)])
    ens, start = [], 0
    for k, nt in enumerate(sizes):
        part = slice(start, start + nt * depth)
        v = rng.normal(size=(nt, 1 << depth))
        ens.append(ObliviousEnsemble(float(k) - 0.5, col[part].reshape(nt, depth),
                                     thr[part].reshape(nt, depth), v, np.ones_like(v),
                                     n_features=p))
        start += nt * depth
    return ens


def _crafted_rows(ens, n=700, seed=1):
    """Random rows, then rows holding every threshold, its neighbours, NaN, +-inf, -0.0."""
    rng = np.random.default_rng(seed)
    p = ens[0].n_features
    X = rng.normal(size=(n, p))
    X[rng.random(X.shape) < 0.1] = np.nan
    t = np.concatenate([e.thresholds.ravel() for e in ens])
    f = np.concatenate([e.features.ravel() for e in ens])
    probe = np.concatenate([t, np.nextafter(t, -np.inf), np.nextafter(t, np.inf)])
    rows = np.repeat(X[:probe.size % n + 1], 1, axis=0)
    on = np.resize(X, (probe.size, p)).copy()
    on[np.arange(probe.size), np.tile(f, 3)] = probe
    special = np.resize(X, (12, p)).copy()
    special[0:3, :] = [[np.inf], [-np.inf], [-0.0]]
    special[3:6, :] = np.nan
    return np.vstack([X, rows, on, special])


@pytest.mark.parametrize("depth", [1, 2, 3, 4, 5, 6, 7, 8])
def test_code_kernel_equals_the_reference_walk_on_awkward_thresholds(depth, monkeypatch):
    pytest.importorskip("numba")
    monkeypatch.setattr(oblivious, "USE_NUMBA", True)
    monkeypatch.setattr(oblivious, "BLOCK_LEVELS", 613)  # several blocks, a ragged last one
    ens = _crafted_forest(depth)
    forest = ObliviousForest(ens)
    assert forest.coded
    assert forest.n_thr[0] > 64 and forest.n_thr[1] <= 64 and forest.n_thr[3] == 65
    assert forest.n_thr[2] == 4  # -0.0 and 0.0 are one threshold, NaN none
    assert (forest.groups[1:-1] - forest.groups[:-2] < 4).any()  # ragged groups
    X = _crafted_rows(ens)
    with np.errstate(invalid="ignore"):
        raw = forest.raw(X, kernel="codes")
    np.testing.assert_array_equal(raw, forest.raw(X, kernel="block"))
    for k, e in enumerate(ens):
        np.testing.assert_array_equal(raw[:, k], _reference_raw(e, X))


def test_forests_the_code_kernel_cannot_take_use_the_float_kernel(monkeypatch):
    pytest.importorskip("numba")
    monkeypatch.setattr(oblivious, "USE_NUMBA", True)
    deep = _crafted_forest(9, n_splits=40)
    rng = np.random.default_rng(2)
    v = rng.normal(size=(256, 2))
    many = ObliviousEnsemble(0.1, np.zeros((256, 1), np.int64), rng.normal(size=(256, 1)),
                             v, np.ones_like(v), n_features=2)  # 256 thresholds, one column
    for ens in (deep, [many]):
        forest = ObliviousForest(ens)
        assert not forest.coded
        with pytest.raises(ValueError, match="8-bit"):
            forest.raw(np.zeros((2, ens[0].n_features)), kernel="codes")
        X = _crafted_rows(ens, n=300)
        raw = forest.raw(X)
        for k, e in enumerate(ens):
            np.testing.assert_array_equal(raw[:, k], _reference_raw(e, X))
    assert ObliviousForest(_crafted_forest(8, n_splits=40)).coded


@pytest.mark.parametrize("n_threads", [1, 2])
@pytest.mark.parametrize("kernel", ["auto", "block", "rows"])
def test_infinite_values_are_found_in_every_column(kernels, kernel, n_threads, monkeypatch):
    monkeypatch.setattr(oblivious, "BLOCK_LEVELS", 97)
    v = np.arange(8.0).reshape(2, 4)
    ens = ObliviousEnsemble(0.0, np.zeros((2, 2), np.int64), np.array([[0.0, 1.0]] * 2),
                            v, np.ones_like(v), n_features=4)  # splits on column 0 only
    forest = ObliviousForest([ens])
    X = np.random.default_rng(3).normal(size=(300, 4))
    X[5, 2] = np.nan
    assert not forest.raw_checked(X, kernel=kernel)[1]
    for row, col, val in ((299, 3, np.inf), (0, 1, -np.inf), (150, 0, np.inf)):
        Xi = X.copy()
        Xi[row, col] = val
        raw, has_inf = forest.raw_checked(Xi, kernel=kernel, n_threads=n_threads)
        assert has_inf  # found whichever thread's block holds the infinity
        np.testing.assert_array_equal(raw[:, 0], _reference_raw(ens, Xi))


def test_prediction_refuses_infinite_values_in_columns_no_split_uses(kernels):
    X, y = _rule_data(n=1200, seed=8)
    X = np.column_stack([X, np.full(X.shape[0], 3.0)])  # constant: never split on
    est = CumulativeObliviousClassifier(n_trees=8, depth=3).fit(X, y)
    assert not any((e.features == X.shape[1] - 1).any() for e in est.ensembles_)
    Xi = X[:50].copy()
    Xi[-1, -1] = np.inf
    for method in (est.predict_proba, est.predict, est.cumulative_proba):
        with pytest.raises(ValueError, match="infinity"):
            method(Xi)
    Xi[-1, -1] = np.nan  # NaN stays allowed
    assert est.predict_proba(Xi).shape == (50, 4)


def test_layouts_and_read_only_inputs_give_the_same_bits(fitted, kernels):
    est, X, _ = fitted
    forest = ObliviousForest(est.ensembles_)
    ref = forest.raw(X)
    ro = X.copy()
    ro.flags.writeable = False
    wide = np.repeat(X, 2, axis=0)
    for Xv in (np.asfortranarray(X), wide[::2], ro, np.asarray(X, dtype=np.float32)):
        expect = ref if Xv.dtype == np.float64 else forest.raw(Xv.astype(np.float64))
        for kernel in ("auto", "block"):
            np.testing.assert_array_equal(forest.raw(Xv, kernel=kernel), expect)
    for kernel in ("auto", "block"):  # infinities found in either layout
        for Xv in (X.copy(), np.asfortranarray(X)):
            Xv[-1, -1] = np.inf
            assert forest.raw_checked(Xv, kernel=kernel)[1]
    np.testing.assert_array_equal(est.predict_proba(np.asfortranarray(X)), est.predict_proba(X))

def test_numba_and_numpy_give_the_same_probabilities(fitted, monkeypatch):
    pytest.importorskip("numba")
    est, X, _ = fitted
    monkeypatch.setattr(oblivious, "_kernels", {})
    monkeypatch.setattr(oblivious, "USE_NUMBA", False)
    slow = est.predict_proba(X)
    monkeypatch.setattr(oblivious, "USE_NUMBA", True)
    np.testing.assert_array_equal(est.predict_proba(X), slow)
    assert oblivious._kernels["predict_codes"] is not None


def test_numba_is_imported_only_when_an_oblivious_model_is_used():
    pytest.importorskip("numba")
    code = (
        "import sys\n"
        "import numpy as np\n"
        "import qcflag, qcflag.cli, qcflag.learn.estimators\n"
        "from qcflag.learn.oblivious import ObliviousEnsemble, ObliviousForest\n"
        "e = ObliviousEnsemble(0.0, np.zeros((2, 1), np.int64), np.zeros((2, 1)),\n"
        "                      np.ones((2, 2)), np.ones((2, 2)), 1)\n"
        "f = ObliviousForest([e])\n"
        "assert 'numba' not in sys.modules, 'numba imported before prediction'\n"
        "f.raw(np.zeros((3, 1)))\n"
        "assert 'numba' in sys.modules, 'numba not used for prediction'\n"
    )
    subprocess.run([sys.executable, "-c", code], check=True, timeout=300)


# ------------------------------------------------------------------------- bins, NaN
def test_codes_below_t_are_exactly_values_at_or_below_the_edge():
    rng = np.random.default_rng(1)
    X = np.column_stack([rng.normal(size=5000),                 # quantile edges
                         rng.integers(0, 7, 5000).astype(float),  # few values: midpoints
                         np.round(rng.exponential(size=5000), 2)])
    edges = bin_edges(X, sample=1000, seed=4)
    assert edges[0].size == 254 and edges[1].size == 6
    for e in edges:
        assert (np.diff(e) > 0).all()
    # every edge itself, one float below and one above, NaN and the extremes
    probe = [np.concatenate([e, np.nextafter(e, -np.inf), np.nextafter(e, np.inf),
                             [np.nan, -np.inf, np.inf, X[:, j].min(), X[:, j].max()]])
             for j, e in enumerate(edges)]
    size = max(p.size for p in probe)
    P = np.column_stack([np.resize(p, size) for p in probe])
    codes = bin_codes(P, edges)
    for j, e in enumerate(edges):
        assert (codes[j][np.isnan(P[:, j])] == MISSING_CODE).all()
        finite = ~np.isnan(P[:, j])
        assert codes[j][finite].max() <= e.size < MISSING_CODE
        for t in range(e.size):
            np.testing.assert_array_equal(codes[j] <= t, P[:, j] <= e[t])


def test_fitted_splits_send_levels_the_same_way_on_codes_and_raw_values(fitted):
    est, X, _ = fitted
    edges = bin_edges(X, seed=0)
    on_edges = np.tile(X[:50], (1, 1))
    for j, e in enumerate(edges):  # put fitted edge values into the rows
        on_edges[:, j] = np.resize(e, 50)
    R = np.vstack([X, on_edges])
    codes = bin_codes(R, edges)
    for ens in est.ensembles_:
        for f, thr in zip(ens.features.ravel(), ens.thresholds.ravel(), strict=True):
            e = edges[f]
            if np.isnan(thr):
                t = -1
            elif np.isinf(thr):
                t = e.size
            else:
                t = int(np.searchsorted(e, thr))
                assert e[t] == thr  # the stored threshold is one of the bin edges
            np.testing.assert_array_equal(codes[f] > t, ~(R[:, f] <= thr))


def test_missing_values_go_to_the_greater_side_and_can_be_learned(kernels):
    rng = np.random.default_rng(2)
    n = 2000
    X = rng.normal(size=(n, 3))
    missing = rng.random(n) < 0.3
    X[missing, 1] = np.nan
    y = missing.astype(int)  # the only signal: whether x1 is missing
    edges = bin_edges(X)
    ens = fit_oblivious(bin_codes(X, edges), edges, y, np.ones(n), n_trees=10, depth=2)
    assert np.isinf(ens.thresholds[0]).any()  # the "present vs missing" split
    assert ((ens.raw(X) > 0) == missing).all()
    nan_row = np.full((1, 3), np.nan)
    leaf = ens.leaves(nan_row)
    assert (leaf == (1 << ens.depth) - 1).all()  # every answer is bit 1


# --------------------------------------------------------------------------- fitting
def test_numba_and_numpy_fitting_give_the_same_model(monkeypatch):
    pytest.importorskip("numba")
    X, y = _rule_data(n=1500, seed=5)
    edges = bin_edges(X)
    codes = bin_codes(X, edges)
    w = np.where(y >= 3, 3.0, 1.0)
    models = []
    for use in (True, False):
        monkeypatch.setattr(oblivious, "_kernels", {})
        monkeypatch.setattr(oblivious, "USE_NUMBA", use)
        models.append(fit_oblivious(codes, edges, y >= 2, w, n_trees=12, depth=5,
                                    subsample=0.7, random_state=3))
    a, b = models
    assert a.baseline == b.baseline
    for name in ObliviousEnsemble._ARRAYS:
        np.testing.assert_array_equal(getattr(a, name), getattr(b, name))


def test_histogram_subtraction_matches_direct_histograms():
    X, _ = _rule_data(n=800, seed=6)
    edges = bin_edges(X)
    codes = bin_codes(X, edges)
    rows = np.arange(800)
    rng = np.random.default_rng(0)
    g, h = rng.normal(size=800), rng.random(800)
    n_cand = np.array([e.size + 1 for e in edges])
    hist = np.zeros((X.shape[1], 8, 256, 2))
    feats, tcodes, G, H = oblivious._grow(codes, rows, g, h, n_cand, 4, 1.0, 0.0, hist,
                                          oblivious._fit_kernels())
    leaf = np.zeros(800, dtype=np.int64)
    for d in range(3):  # the histograms left for depth 3 are those of the 8 leaves
        leaf |= (codes[feats[d]] > tcodes[d]).astype(np.int64) << d
    for lf in range(8):
        for j in range(X.shape[1]):
            sel = leaf == lf
            direct = np.bincount(codes[j, sel], g[sel], 256)
            np.testing.assert_allclose(hist[j, lf, :, 0], direct, atol=1e-9)
    np.testing.assert_allclose(G.sum(), g.sum())
    np.testing.assert_allclose(H.sum(), h.sum())


def test_same_seed_same_model_and_subsample_changes_it():
    X, y = _rule_data(n=1200, seed=7)
    a = CumulativeObliviousClassifier(n_trees=8, depth=3, subsample=0.5).fit(X, y)
    b = CumulativeObliviousClassifier(n_trees=8, depth=3, subsample=0.5).fit(X, y)
    c = CumulativeObliviousClassifier(n_trees=8, depth=3, subsample=0.5,
                                      random_state=9).fit(X, y)
    np.testing.assert_array_equal(a.predict_proba(X), b.predict_proba(X))
    assert not np.array_equal(a.predict_proba(X), c.predict_proba(X))


def test_learns_a_nonlinear_rule_on_unseen_levels():
    X, y = _rule_data(n=6000, seed=8)
    Xt, yt = _rule_data(n=3000, seed=9)
    est = CumulativeObliviousClassifier(n_trees=80, depth=4, class_weight=None).fit(X, y)
    pred = est.predict(Xt)
    acc = (pred == yt).mean()
    majority = (yt == np.bincount(y).argmax()).mean()
    assert acc > majority + 0.25, (acc, majority)
    assert np.abs(pred - yt).mean() < 0.5 * np.abs(np.median(y) - yt).mean()


def test_probabilities_sum_to_one_and_cumulatives_decrease(fitted):
    est, X, _ = fitted
    rng = np.random.default_rng(0)
    Z = X * rng.uniform(0.1, 30.0, size=X.shape[1])  # far outside the training range too
    p = est.predict_proba(Z)
    assert p.shape == (Z.shape[0], 4) and (p >= 0).all()
    np.testing.assert_allclose(p.sum(axis=1), 1.0, atol=1e-12)
    cum = est.cumulative_proba(Z)
    assert (np.diff(cum, axis=1) <= 0).all()
    assert set(np.unique(est.predict(Z))) <= {1, 2, 3, 4}


def test_cumulatives_are_the_running_minimum_of_the_threshold_probabilities():
    from qcflag.learn.trees import expit

    est = CumulativeObliviousClassifier()
    est.ensembles_ = _crafted_forest(4, n_splits=60)  # random leaves: thresholds cross
    est.classes_, est.seen_ = np.array([1, 2, 3, 4]), np.ones(4, dtype=bool)
    est.n_features_in_ = 5
    X = _crafted_rows(est.ensembles_, n=400)
    X = X[~np.isinf(X).any(axis=1)]
    gt = expit(ObliviousForest(est.ensembles_).raw(X))
    assert (gt[:, 1:] > gt[:, :-1]).any()  # there is something to take the minimum of
    cum = est.cumulative_proba(X)
    np.testing.assert_array_equal(cum, np.minimum.accumulate(gt, axis=1))
    p = est.predict_proba(X)
    np.testing.assert_array_equal(p[:, 1:3], cum[:, :2] - cum[:, 1:])
    np.testing.assert_array_equal(p[:, 0], 1.0 - cum[:, 0])
    np.testing.assert_array_equal(p[:, 3], cum[:, 2])


def test_contributions_add_up_to_the_log_odds(fitted):
    est, X, _ = fitted
    for e in est.ensembles_:
        c = e.contributions(X[:400])
        expected = e.baseline + e.prefix_means()[0][:, 0].sum()
        np.testing.assert_allclose(c.sum(axis=1) + expected, e.raw(X[:400]), atol=1e-10)
        used = np.zeros(X.shape[1], dtype=bool)
        used[np.unique(e.features)] = True
        assert (c[:, ~used] == 0).all()
    total = est.contributions(X[:400])
    np.testing.assert_allclose(total, sum(e.contributions(X[:400]) for e in est.ensembles_))


def test_single_grade_and_unseen_grade():
    X, y = _rule_data(n=400)
    est = CumulativeObliviousClassifier(n_trees=3).fit(X, np.full(400, 2))
    np.testing.assert_array_equal(est.predict_proba(X[:2]), [[0, 1, 0, 0]] * 2)
    est = CumulativeObliviousClassifier(n_trees=5, depth=3).fit(X, np.where(y == 2, 1, y))
    p = est.predict_proba(X)
    assert (p[:, 1] == 0).all() and len(est.ensembles_) == 2


def test_all_nan_and_constant_columns_give_no_split():
    X, y = _rule_data(n=500)
    X[:, 1] = np.nan
    X[:, 2] = 3.0
    est = CumulativeObliviousClassifier(n_trees=10, depth=3).fit(X, y)
    for e in est.ensembles_:
        assert not np.isin(e.features[np.isfinite(e.thresholds)], [1, 2]).any()
    Z = np.zeros((1, X.shape[1]))
    Z[0, 0] = np.nan
    assert np.isfinite(est.predict_proba(Z)).all()


def test_fitted_attributes_are_documented():
    X, y = _rule_data(n=300)
    est = CumulativeObliviousClassifier(n_trees=3).fit(X, y)
    fitted_attrs = {k for k in vars(est) if k.endswith("_") and not k.startswith("_")}
    doc = CumulativeObliviousClassifier.__doc__.split("Attributes")[1]
    heads = re.findall(r"^ {4}(\w+(?:, \w+)*) :", doc, flags=re.M)
    assert fitted_attrs <= {n for h in heads for n in h.split(", ")}


def test_make_estimator_name():
    est = make_estimator("boosted-oblivious", seed=4)
    assert isinstance(est, CumulativeObliviousClassifier) and est.random_state == 4


# --------------------------------------------------------------------- persistence
def _model(est):
    names = [f"f{i}" for i in range(est.n_features_in_)]
    return QCModel(estimators={"temperature": est}, feature_names={"temperature": names})


def test_model_file_round_trip_and_pickle(fitted, tmp_path):
    est, X, _ = fitted
    back = load_model(save_model(_model(est), tmp_path / "m.qcm")).estimators["temperature"]
    assert isinstance(back, CumulativeObliviousClassifier)
    for fn in ("predict_proba", "predict", "contributions"):
        np.testing.assert_array_equal(getattr(back, fn)(X), getattr(est, fn)(X))
    again = pickle.loads(pickle.dumps(est))
    np.testing.assert_array_equal(again.predict_proba(X), est.predict_proba(X))


def _rehash(members):
    from qcflag.learn.store import _INTEGRITY_JSON, _digest

    body = {k: v for k, v in members.items() if k != _INTEGRITY_JSON}
    per, digest = _digest(body)
    members[_INTEGRITY_JSON] = json.dumps(
        {"algorithm": "sha256", "members": per, "digest": digest}).encode()


@pytest.mark.parametrize(("array", "edit"), [
    ("t0_features", lambda a: a + 100),                 # a feature the model lacks
    ("t1_leaf_values", lambda a: np.where(a == a.flat[0], np.nan, a)),  # non-finite value
    ("t2_thresholds", lambda a: a[:, :-1]),              # shape differs from features
    ("t0_leaf_weights", lambda a: a.astype(np.float32)),  # wrong dtype
])
def test_inconsistent_arrays_are_refused(fitted, tmp_path, array, edit):
    est, _, _ = fitted
    path = save_model(_model(est), tmp_path / "m.qcm")
    with zipfile.ZipFile(path) as zf:
        members = {n: zf.read(n) for n in zf.namelist()}
    name = f"arrays/temperature/{array}.npy"
    buf = io.BytesIO()
    np.save(buf, edit(np.load(io.BytesIO(members[name]))))
    members[name] = buf.getvalue()
    _rehash(members)  # a consistent hash: only the validation can catch it
    bad = tmp_path / "bad.qcm"
    with zipfile.ZipFile(bad, "w") as zf:
        for k, v in members.items():
            zf.writestr(k, v)
    with pytest.raises(ModelFileError, match="inconsistent"):
        load_model(bad)


def test_validate_refuses_bad_ensembles():
    good = {"baseline": 0.0, "features": np.zeros((2, 3), np.int64),
            "thresholds": np.zeros((2, 3)), "leaf_values": np.zeros((2, 8)),
            "leaf_weights": np.ones((2, 8)), "n_features": 2}
    ObliviousEnsemble(**good).validate()
    for change in ({"leaf_values": np.zeros((2, 4))}, {"features": np.full((2, 3), 2)},
                   {"leaf_weights": -np.ones((2, 8))}, {"baseline": float("inf")},
                   {"features": np.zeros((2, 13), np.int64)}):
        with pytest.raises(ValueError):
            ObliviousEnsemble(**{**good, **change}).validate()


def test_train_model_fits_an_oblivious_model_that_flags(tmp_path):
    from qcflag.cli.train import _ESTIMATORS
    from qcflag.learn import train_model
    from qcflag.pipeline import flag_batch
    from qcflag.simulate import SimulationConfig, simulate_archive

    assert "boosted-oblivious" in _ESTIMATORS
    archive = simulate_archive(4, seed=5, config=SimulationConfig(
        casts_per_cruise=3, floats_per_cruise=0, max_cast_pressure=300))
    hold = sorted(archive.profiles["cruise"].unique())[-1:]
    model, report = train_model(archive, estimator="boosted-oblivious", folds=3,
                                holdout_cruises=hold, max_train_levels=5000,
                                estimator_params={"n_trees": 20, "depth": 4})
    assert "boosted-oblivious" in report.to_text()
    back = load_model(save_model(model, tmp_path / "m.qcm"))
    assert isinstance(back.estimators["temperature"], CumulativeObliviousClassifier)
    test = archive.select(archive.profiles["cruise"].isin(hold).to_numpy())
    result = flag_batch(test, model=back)
    again = flag_batch(test, model=model)
    grade = result["temperature"].grade
    assert grade.shape == (test.n_levels,) and set(np.unique(grade)) <= {0, 1, 2, 3, 4}
    np.testing.assert_array_equal(grade, again["temperature"].grade)
    proba = result["temperature"].proba
    ok = np.isfinite(proba).all(axis=1)
    assert ok.any()
    np.testing.assert_allclose(proba[ok].sum(axis=1), 1.0, atol=1e-9)
