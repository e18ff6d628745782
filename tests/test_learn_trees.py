"""Tree walkers: the numba kernel and scikit-learn's walkers give the classifier's own bits.

Every check compares with ``HistGradientBoostingClassifier.decision_function`` of real fitted
models (scikit-learn's own prediction, which we did not write) with exact equality: both of
our walkers must sum the same leaf values in the same order.
"""

from __future__ import annotations

import pickle
import subprocess
import sys

import numpy as np
import pytest
from sklearn.ensemble import HistGradientBoostingClassifier
from threadpoolctl import threadpool_limits

from qcflag.learn import trees
from qcflag.learn.trees import TreeEnsemble, TreeForest

WALKERS = ["numba", "scikit-learn"]


@pytest.fixture(autouse=True)
def _one_thread():
    # the test machine is shared; oversubscribed OpenMP threads only slow things down
    with threadpool_limits(limits=1):
        yield


@pytest.fixture(params=WALKERS)
def walker(request, monkeypatch):
    """Force one walker; the numba one must really be the one that runs."""
    monkeypatch.setattr(trees, "_kernel_cache", {})
    if request.param == "numba":
        pytest.importorskip("numba")
        monkeypatch.setattr(trees, "USE_NUMBA", True)
        assert trees._numba_kernel() is not None
    else:
        monkeypatch.setattr(trees, "USE_NUMBA", False)
        assert trees._numba_kernel() is None
    return request.param


def _data(n=1200, seed=0, p=6, nan_share=0.08):
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n, p))
    latent = X[:, 0] + 0.5 * X[:, 1] - 0.3 * X[:, 4] + 0.5 * rng.logistic(size=n)
    y = np.digitize(latent, [0.0, 0.8, 1.6]) + 1
    X[rng.random(X.shape) < nan_share] = np.nan
    X[: n // 3, 3] = np.nan  # a column often missing: splits send NaN both ways
    return X, y


def _models(X, y, iters=25):
    return [HistGradientBoostingClassifier(max_iter=iters, max_leaf_nodes=15,
                                           early_stopping=False, random_state=k)
            .fit(X, (y > k).astype(int)) for k in (1, 2, 3)]


def _hard_rows(X, ens):
    """Rows on split thresholds, just above them, at +-inf and all-NaN, then ordinary rows."""
    inner = ~ens.nodes["is_leaf"]
    thr, feat = ens.nodes["threshold"][inner], ens.nodes["feature"][inner]
    k = min(60, thr.size)
    Xt = np.repeat(X[:k], 2, axis=0)
    rows = np.arange(k)
    Xt[rows, feat[:k]] = thr[:k]
    Xt[rows + k, feat[:k]] = np.nextafter(thr[:k], np.inf)
    extra = np.repeat(X[:4], 4, axis=0)
    extra[0:4, 0] = np.inf
    extra[4:8, 1] = -np.inf
    extra[8:12] = np.nan
    extra[12:16, 3] = np.nan
    return np.vstack([Xt, extra, X])


def test_walkers_give_decision_function_bits(walker, monkeypatch):
    X, y = _data()
    models = _models(X, y)
    ens = [TreeEnsemble.from_sklearn(m) for m in models]
    missing = np.concatenate([e.nodes["missing_left"][~e.nodes["is_leaf"]] for e in ens])
    assert missing.any() and not missing.all()  # both NaN directions are exercised
    Xt = _hard_rows(X, ens[0])
    # blocks of 97 levels: many blocks, groups of 8 levels cut short, a ragged last block
    monkeypatch.setattr(trees, "BLOCK_LEVELS", 97)
    forest = TreeForest(ens)
    assert forest.binned and not forest.dummy
    for nt in (1, 2):
        raw = forest.raw(Xt, n_threads=nt)
        for k, m in enumerate(models):
            np.testing.assert_array_equal(raw[:, k], m.decision_function(Xt))


def test_walkers_agree_on_large_blocks_and_odd_sizes(walker):
    # the default block (several 512-level sub-blocks inside it) and sizes not divisible by 8
    X, y = _data(n=2500, seed=1)
    models = _models(X, y, iters=10)
    forest = TreeForest([TreeEnsemble.from_sklearn(m) for m in models])
    for n in (1, 7, 8, 9, 513, 2500):
        raw = forest.raw(X[:n])
        for k, m in enumerate(models):
            np.testing.assert_array_equal(raw[:, k], m.decision_function(X[:n]))
    assert forest.raw(X[:0]).shape == (0, 3)


def test_numba_and_scikit_learn_walkers_agree_on_a_fitted_cumulative_model(monkeypatch):
    pytest.importorskip("numba")
    from qcflag.learn import CumulativeBoostedClassifier

    X, y = _data(n=3000, seed=2)
    est = CumulativeBoostedClassifier(max_iter=30).fit(X, y)
    Xt = _hard_rows(X, est.ensembles_[0])
    monkeypatch.setattr(trees, "_kernel_cache", {})
    monkeypatch.setattr(trees, "USE_NUMBA", False)
    finite = Xt[~np.isinf(Xt).any(axis=1)]  # predict_proba refuses infinities
    slow = est._forest.raw(Xt)
    proba_slow = est.predict_proba(finite)
    monkeypatch.setattr(trees, "_kernel_cache", {})
    monkeypatch.setattr(trees, "USE_NUMBA", True)
    np.testing.assert_array_equal(est._forest.raw(Xt), slow)
    np.testing.assert_array_equal(est.predict_proba(finite), proba_slow)
    assert trees._kernel_cache["block"] is not None



def test_walkers_report_infinite_values_in_every_column(walker, monkeypatch):
    X, y = _data(n=900, seed=4)
    X[:, 5] = 1.0  # constant: no split uses it
    models = _models(X, y, iters=5)
    forest = TreeForest([TreeEnsemble.from_sklearn(m) for m in models])
    assert 5 not in forest.columns
    monkeypatch.setattr(trees, "BLOCK_LEVELS", 97)
    assert not forest.raw_checked(X)[1]  # NaN is not infinite
    for row, col, val in ((899, 5, np.inf), (0, 2, -np.inf), (450, 0, np.inf)):
        Xi = X.copy()
        Xi[row, col] = val
        raw, has_inf = forest.raw_checked(Xi)
        assert has_inf
        for k, m in enumerate(models):
            np.testing.assert_array_equal(raw[:, k], m.decision_function(Xi))
    from qcflag.learn import CumulativeBoostedClassifier

    est = CumulativeBoostedClassifier(max_iter=5).fit(X, y)
    Xi = X[:30].copy()
    Xi[-1, 5] = -np.inf
    with pytest.raises(ValueError, match="infinity"):
        est.predict_proba(Xi)

def test_model_without_splits(walker):
    X, y = _data(n=400)
    const = np.zeros_like(X)  # nothing to split on: every tree is a single leaf
    flat = HistGradientBoostingClassifier(max_iter=5, early_stopping=False).fit(const, y > 2)
    split = _models(X, y, iters=5)[0]
    ens_flat = TreeEnsemble.from_sklearn(flat)
    assert ens_flat.nodes["is_leaf"].all()
    Xt = _hard_rows(X, TreeEnsemble.from_sklearn(split))
    alone = TreeForest([ens_flat])
    assert alone.dummy
    np.testing.assert_array_equal(alone.raw(Xt)[:, 0], flat.decision_function(Xt))
    mixed = TreeForest([TreeEnsemble.from_sklearn(split), ens_flat])
    raw = mixed.raw(Xt)
    np.testing.assert_array_equal(raw[:, 0], split.decision_function(Xt))
    np.testing.assert_array_equal(raw[:, 1], flat.decision_function(Xt))


def test_forest_pickles_and_rebuilds(walker):
    X, y = _data(n=600)
    models = _models(X, y, iters=5)
    forest = TreeForest([TreeEnsemble.from_sklearn(m) for m in models])
    again = pickle.loads(pickle.dumps(forest))
    np.testing.assert_array_equal(again.raw(X), forest.raw(X))
    np.testing.assert_array_equal(again.words, forest.words)


def test_pair_layout_puts_children_side_by_side():
    X, y = _data(n=800)
    ens = TreeEnsemble.from_sklearn(_models(X, y, iters=8)[1])
    nd, off = ens.nodes, ens.tree_offsets
    new = trees._pair_layout(nd["left"], nd["right"], nd["is_leaf"], off)
    sizes = np.diff(off)
    tree = np.repeat(np.arange(sizes.size), sizes)
    start = np.repeat(off[:-1], sizes)
    assert np.array_equal(np.sort(new), np.arange(new.size))  # a permutation
    assert np.array_equal(tree[new], tree)  # that keeps every node in its tree
    assert np.array_equal(new[off[:-1]], off[:-1])  # and the roots in place
    inner = np.flatnonzero(~nd["is_leaf"])
    lft, rgt = new[start[inner] + nd["left"][inner]], new[start[inner] + nd["right"][inner]]
    assert np.array_equal(rgt, lft + 1)
    assert (lft > new[inner]).all()  # children after their parent


def test_numba_without_a_cache_directory_still_compiles(monkeypatch):
    numba = pytest.importorskip("numba")
    real = numba.njit
    calls = []

    def njit(*args, **kwargs):
        if args:  # numba's own modules decorating their helpers
            return real(*args, **kwargs)
        calls.append(kwargs["cache"])
        if kwargs["cache"]:  # what numba raises when no cache directory is writable
            raise RuntimeError("cannot cache function: no locator available")
        return real(**kwargs)

    monkeypatch.setattr(numba, "njit", njit)
    monkeypatch.setattr(trees, "_kernel_cache", {})
    monkeypatch.setattr(trees, "USE_NUMBA", True)
    X, y = _data(n=300)
    model = _models(X, y, iters=3)[0]
    raw = TreeForest([TreeEnsemble.from_sklearn(model)]).raw(X)
    np.testing.assert_array_equal(raw[:, 0], model.decision_function(X))
    assert calls == [True, False, True, False]  # the walker, then the infinity counter


def test_numba_is_imported_only_when_a_boosted_model_predicts():
    pytest.importorskip("numba")
    code = (
        "import sys\n"
        "import numpy as np\n"
        "import qcflag, qcflag.cli, qcflag.learn.estimators\n"
        "from sklearn.ensemble import HistGradientBoostingClassifier\n"
        "from qcflag.learn.trees import TreeEnsemble, TreeForest\n"
        "assert 'numba' not in sys.modules, 'numba imported at start-up'\n"
        "X = np.arange(400.0).reshape(200, 2); y = (np.arange(200) > 90).astype(int)\n"
        "f = TreeForest([TreeEnsemble.from_sklearn(\n"
        "    HistGradientBoostingClassifier(max_iter=2).fit(X, y))])\n"
        "assert 'numba' not in sys.modules, 'numba imported by building a forest'\n"
        "assert not f.dummy\n"
        "f.raw(X)\n"
        "assert 'numba' in sys.modules, 'numba not used for prediction'\n"
    )
    subprocess.run([sys.executable, "-c", code], check=True, timeout=300)
