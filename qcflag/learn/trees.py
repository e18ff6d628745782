"""Fitted gradient-boosted trees held as plain arrays.

A :class:`TreeEnsemble` is the part of a fitted binary
:class:`~sklearn.ensemble.HistGradientBoostingClassifier` that prediction needs: a baseline
log-odds and, for every tree, its nodes (split feature, numeric threshold, where missing values
go, children, leaf value). It holds only numeric arrays, so it can be written to a model file
and read back without pickle (see :mod:`qcflag.learn.store`).

Prediction goes through :class:`TreeForest`, built once per set of ensembles and cached:
every split threshold of a feature is one of few distinct values, so the forest codes each
input value by how many of its feature's thresholds lie below it (an 8-bit code, NaN its own
code) and walks all trees of all ensembles on these codes, a cache-sized block of levels at a
time. ``x <= t`` holds exactly when ``code(x) <= position of t``, so the scores are
bit-identical to walking the raw values (and to the classifier's own ``decision_function``):
each level's leaf values are summed in the same order. The walker is a numba-compiled kernel
of our own when numba is installed (imported on first prediction only), and scikit-learn's
compiled tree walkers otherwise; both give the same bits. :meth:`TreeEnsemble.raw_numpy` is
an independent vectorised evaluator of our own that walks all samples one tree depth at a
time; the tests check all three against scikit-learn.

Only numeric (non-categorical) splits are supported; qcflag's features are all numeric.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any, TypeVar

import numpy as np

if TYPE_CHECKING:
    from collections.abc import Callable

    from numpy.typing import NDArray
    from sklearn.ensemble import HistGradientBoostingClassifier

__all__ = ["NODE_FIELDS", "TreeEnsemble", "TreeForest", "expit"]

NODE_FIELDS: dict[str, str] = {
    "feature": "int64",
    "threshold": "float64",
    "missing_left": "bool",
    "left": "int64",
    "right": "int64",
    "is_leaf": "bool",
    "value": "float64",
    "count": "int64",
    "bin_threshold": "int64",
    "mean_value": "float64",
}
"""Per-node arrays of an ensemble and their dtypes (``left``/``right`` index within a tree)."""


def expit(x: NDArray[np.float64]) -> NDArray[np.float64]:
    """Logistic function ``1 / (1 + exp(-x))``, computed without overflow.

    ``1 / (1 + exp(-x))`` where ``x >= 0`` and ``e / (1 + e)`` with ``e = exp(x)``
    elsewhere, in whole-array operations (no masked gathers and scatters): ``e = exp(-|x|)``
    (``minimum(x, -x)``, which keeps a NaN's sign) and the numerator ``maximum(e, x >= 0)``,
    which is 1 where ``x >= 0`` (there ``e <= 1``), ``e`` elsewhere and NaN for NaN. Runs
    over chunks of :data:`_EXPIT_CHUNK` values, so the temporaries stay in the cache.
    """
    x = np.asarray(x)
    if not np.issubdtype(x.dtype, np.floating):
        x = x.astype(np.float64)
    out = np.empty(x.shape, dtype=np.float64)
    flat, flat_out = np.ascontiguousarray(x).reshape(-1), out.reshape(-1)
    chunk = max(1, min(_EXPIT_CHUNK, flat.size))
    e_buf, num_buf = np.empty(chunk, dtype=x.dtype), np.empty(chunk, dtype=x.dtype)
    for start in range(0, flat.size, chunk):
        xs = flat[start:start + chunk]
        e, num = e_buf[:xs.size], num_buf[:xs.size]
        np.negative(xs, out=e)
        np.minimum(xs, e, out=e)  # -|x|; NaN: x itself
        np.exp(e, out=e)
        np.greater_equal(xs, 0, out=num)
        np.maximum(e, num, out=num)
        e += 1.0
        if num.dtype == np.float64:
            np.divide(num, e, out=flat_out[start:start + xs.size])
        else:  # computed in the input's precision, like the formula on the whole array
            num /= e
            flat_out[start:start + xs.size] = num
    return out


_EXPIT_CHUNK = 16_384


def _subtree_means(
    left: NDArray[np.int64], right: NDArray[np.int64], is_leaf: NDArray[np.bool_],
    value: NDArray[np.float64], count: NDArray[np.int64], depth: NDArray[np.int64],
) -> NDArray[np.float64]:
    """Count-weighted mean of the leaf values below each node (equals the value at leaves).

    Internal node values stored by scikit-learn are not on the same (shrunk) scale as the
    leaves, so path attributions use these means instead. Vectorised per depth level.
    """
    mean = np.where(is_leaf, value, 0.0)
    w = np.maximum(count, 1).astype(np.float64)
    for d in range(int(depth.max(initial=0)) - 1, -1, -1):
        idx = np.flatnonzero((depth == d) & ~is_leaf)
        if idx.size:
            lw, rw = w[left[idx]], w[right[idx]]
            mean[idx] = (lw * mean[left[idx]] + rw * mean[right[idx]]) / (lw + rw)
    return mean


@dataclass
class TreeEnsemble:
    """Additive ensemble of binary regression trees on the log-odds scale.

    Parameters
    ----------
    baseline : float
        Initial log-odds (the ensemble's intercept).
    tree_offsets : ndarray of int64, shape (n_trees + 1,)
        Node ``i`` of tree ``t`` is row ``tree_offsets[t] + i`` of the node arrays.
    nodes : dict of str to ndarray
        One array per :data:`NODE_FIELDS` entry, all of length ``tree_offsets[-1]``.
    n_features : int
        Number of input columns.
    """

    baseline: float
    tree_offsets: NDArray[np.int64]
    nodes: dict[str, NDArray[Any]]
    n_features: int
    _cache: TreeForest | None = field(default=None, repr=False, compare=False)

    # ---------------------------------------------------------------- building
    @classmethod
    def from_sklearn(
        cls, model: HistGradientBoostingClassifier, *,
        feature_map: NDArray[np.int64] | None = None, n_features: int | None = None,
    ) -> TreeEnsemble:
        """Extract the arrays of a fitted binary HistGradientBoostingClassifier.

        Parameters
        ----------
        model : HistGradientBoostingClassifier
            Fitted on a binary target.
        feature_map : ndarray of int, optional
            Column of the full input matrix for each column the model was fitted on (when
            it was fitted on a subset of columns).
        n_features : int, optional
            Columns of the full input matrix (default: the model's).
        """
        if getattr(model, "n_trees_per_iteration_", 1) != 1:
            raise ValueError("only binary HistGradientBoostingClassifier models are supported")
        trees = [it[0].nodes for it in model._predictors]
        if any(t["is_categorical"].any() for t in trees):
            raise ValueError("categorical splits are not supported")
        sizes = np.array([t.shape[0] for t in trees], dtype=np.int64)
        offsets = np.concatenate([[0], np.cumsum(sizes)]).astype(np.int64)
        if trees:
            allnodes = np.concatenate(trees)
        else:
            from sklearn.ensemble._hist_gradient_boosting.common import (
                PREDICTOR_RECORD_DTYPE,
            )

            allnodes = np.zeros(0, dtype=PREDICTOR_RECORD_DTYPE)
        nodes = {
            "feature": (allnodes["feature_idx"].astype(np.int64) if feature_map is None
                        else np.asarray(feature_map, dtype=np.int64)[allnodes["feature_idx"]]),
            "threshold": allnodes["num_threshold"].astype(np.float64),
            "missing_left": allnodes["missing_go_to_left"].astype(bool),
            "left": allnodes["left"].astype(np.int64),
            "right": allnodes["right"].astype(np.int64),
            "is_leaf": allnodes["is_leaf"].astype(bool),
            "value": allnodes["value"].astype(np.float64),
            "count": allnodes["count"].astype(np.int64),
            "bin_threshold": allnodes["bin_threshold"].astype(np.int64),
        }
        start = np.repeat(offsets[:-1], sizes)
        depth = allnodes["depth"].astype(np.int64)
        nodes["mean_value"] = _subtree_means(
            nodes["left"] + start, nodes["right"] + start, nodes["is_leaf"],
            nodes["value"], nodes["count"], depth,
        )
        baseline = float(np.asarray(model._baseline_prediction).ravel()[0])
        nf = int(model.n_features_in_ if n_features is None else n_features)
        return cls(baseline, offsets, nodes, nf)

    def validate(self) -> None:
        """Check shapes, dtypes and that every child index points inside its own tree.

        Raises
        ------
        ValueError
            On any inconsistency (the store turns it into ``ModelFileError``).
        """
        off = np.asarray(self.tree_offsets)
        if off.ndim != 1 or off.size < 1 or off[0] != 0 or (np.diff(off) < 1).any():
            raise ValueError("tree offsets are not increasing from 0")
        n = int(off[-1])
        for name, dtype in NODE_FIELDS.items():
            arr = self.nodes.get(name)
            if arr is None or arr.shape != (n,) or arr.dtype != np.dtype(dtype):
                raise ValueError(f"node array {name!r} missing or malformed")
        sizes = np.diff(off)
        size = np.repeat(sizes, sizes)
        internal = ~self.nodes["is_leaf"]
        for side in ("left", "right"):
            child = self.nodes[side][internal]
            if ((child <= 0) | (child >= size[internal])).any():
                raise ValueError(f"node array {side!r} points outside its tree")
        feat = self.nodes["feature"][internal]
        if ((feat < 0) | (feat >= self.n_features)).any():
            raise ValueError("a split refers to a feature the model does not have")
        # children must come after their parent, so walks always terminate
        local = np.arange(n) - np.repeat(off[:-1], sizes)
        if (self.nodes["left"][internal] <= local[internal]).any() or (
            self.nodes["right"][internal] <= local[internal]
        ).any():
            raise ValueError("tree children do not follow their parent")

    @property
    def n_trees(self) -> int:
        """Number of trees."""
        return int(self.tree_offsets.size - 1)

    # -------------------------------------------------------------- prediction
    def __getstate__(self) -> dict[str, Any]:
        """Pickle the arrays only; the compiled evaluator is rebuilt when needed."""
        return {**self.__dict__, "_cache": None}

    def _forest(self) -> TreeForest:
        if self._cache is None:
            self._cache = TreeForest([self])
        return self._cache

    def raw(self, X: NDArray[np.float64], *, n_threads: int | None = None) -> NDArray[np.float64]:
        """Log-odds of the positive class, shape (n_samples,)."""
        return self._forest().raw(X, n_threads=n_threads)[:, 0]

    def _walk(self, X: NDArray[np.float64], t: int) -> tuple[NDArray[np.int64], list[Any]]:
        """Leaf (global node index) of every sample in tree `t`, and the path steps."""
        nd = self.nodes
        start = int(self.tree_offsets[t])
        node = np.full(X.shape[0], start, dtype=np.int64)
        rows = np.arange(X.shape[0])
        steps = []
        active = np.flatnonzero(~nd["is_leaf"][node])
        while active.size:
            cur = node[active]
            x = X[rows[active], nd["feature"][cur]]
            go_left = np.where(np.isnan(x), nd["missing_left"][cur], x <= nd["threshold"][cur])
            nxt = start + np.where(go_left, nd["left"][cur], nd["right"][cur])
            steps.append((active, cur, nxt))
            node[active] = nxt
            active = active[~nd["is_leaf"][nxt]]
        return node, steps

    def raw_numpy(self, X: NDArray[np.float64]) -> NDArray[np.float64]:
        """Compute :meth:`raw` with a pure-numpy evaluator (one pass per tree depth)."""
        X = np.asarray(X, dtype=np.float64)
        out = np.full(X.shape[0], self.baseline, dtype=np.float64)
        for t in range(self.n_trees):
            leaf, _ = self._walk(X, t)
            out += self.nodes["value"][leaf]
        return out

    def contributions(self, X: NDArray[np.float64]) -> NDArray[np.float64]:
        """Per-feature path attributions of the log-odds, shape (n_samples, n_features).

        Each split on a sample's path credits its feature with the change of the subtree
        mean leaf value from parent to child (Saabas' path attribution). Rows sum to
        ``raw(X) - baseline - sum of the root means`` (the expected tree output).
        """
        X = np.asarray(X, dtype=np.float64)
        n, p = X.shape
        out = np.zeros(n * p, dtype=np.float64)
        mean = self.nodes["mean_value"]
        for t in range(self.n_trees):
            _, steps = self._walk(X, t)
            for active, cur, nxt in steps:
                idx = active * p + self.nodes["feature"][cur]
                out += np.bincount(idx, weights=mean[nxt] - mean[cur], minlength=n * p)
        return out.reshape(n, p)

    # ------------------------------------------------------------ persistence
    def to_arrays(self, prefix: str) -> tuple[dict[str, Any], dict[str, NDArray[Any]]]:
        """JSON-able scalars and named arrays, for the model store."""
        arrays = {f"{prefix}tree_offsets": np.asarray(self.tree_offsets, dtype=np.int64)}
        arrays.update({f"{prefix}{k}": np.asarray(v) for k, v in self.nodes.items()})
        return {"baseline": float(self.baseline), "n_features": int(self.n_features)}, arrays

    @classmethod
    def from_arrays(
        cls, meta: dict[str, Any], arrays: dict[str, NDArray[Any]], prefix: str
    ) -> TreeEnsemble:
        """Inverse of :meth:`to_arrays`; validates the result."""
        ens = cls(
            float(meta["baseline"]),
            arrays[f"{prefix}tree_offsets"],
            {k: arrays[f"{prefix}{k}"] for k in NODE_FIELDS},
            int(meta["n_features"]),
        )
        ens.validate()
        return ens


#: levels per block in :meth:`TreeForest.raw` (codes of a block stay in the L2 cache)
BLOCK_LEVELS = 16_384
_MISSING_CODE = 255
#: use the numba-compiled walker when numba imports (tests set it False to force scikit-learn's)
USE_NUMBA = True
_LEAF_CODE = 255  # threshold code of a leaf: no code exceeds it, so a leaf steps to itself
_kernel_cache: dict[str, Any] = {}
T = TypeVar("T")


def _pair_layout(
    left: NDArray[np.int64], right: NDArray[np.int64], is_leaf: NDArray[np.bool_],
    offsets: NDArray[np.int64],
) -> NDArray[np.int64]:
    """Renumber the nodes so that each split's two children are neighbours.

    Trees keep their ranges of positions and their roots; the children of the splits at
    one depth are placed, tree by tree in the new order of their parents, after those of
    the depth above (a breadth-first order). Vectorised per depth over all trees.

    Parameters
    ----------
    left, right : ndarray of int64
        Children as positions within their tree.
    is_leaf : ndarray of bool
        Leaf flags.
    offsets : ndarray of int64
        Tree ``t`` holds nodes ``offsets[t]:offsets[t + 1]``.

    Returns
    -------
    ndarray of int64
        New global position of every node, indexed by its old global position.
    """
    sizes = np.diff(offsets)
    start = np.repeat(offsets[:-1], sizes)
    tree = np.repeat(np.arange(sizes.size), sizes)
    new = np.full(left.size, -1, dtype=np.int64)
    roots = offsets[:-1]
    new[roots] = roots
    nxt = roots + 1  # next free position of each tree
    front = roots[~is_leaf[roots]]
    while front.size:
        front = front[np.argsort(new[front], kind="stable")]  # by tree, then by position
        t = tree[front]
        first = np.searchsorted(t, t)  # first entry of the same tree in the frontier
        pos = nxt[t] + 2 * (np.arange(front.size) - first)
        lft, rgt = start[front] + left[front], start[front] + right[front]
        new[lft], new[rgt] = pos, pos + 1
        np.add.at(nxt, t, 2)
        kids = np.concatenate([lft, rgt])
        front = kids[~is_leaf[kids]]
    return new


def _forest_block_py(  # pragma: no cover - runs compiled by numba (see _numba_kernel)
    X: NDArray[np.float64], start: int, stop: int, cols: NDArray[np.int64],
    thresholds: NDArray[np.float64], words: NDArray[np.uint64], values: NDArray[np.float64],
    roots: NDArray[np.int64], tree_ens: NDArray[np.int64], baselines: NDArray[np.float64],
    out: NDArray[np.float64],
) -> None:
    """Code and walk levels ``start:stop`` of `X` into ``out[start:stop]`` (numba kernel).

    Levels are taken 512 at a time (their codes stay in the L1 cache). Coding: a branch-free
    lower bound in the feature's 256 sorted thresholds (padded with +inf) gives the number of
    thresholds below the value; column ``j`` holds it with NaN as 255 and column ``j + n_cols``
    with NaN as 0, so a split whose missing values go left reads the second copy and ``code >
    threshold code`` always sends NaN the right way. Walking: every node is one 64-bit word
    (child pair position in the low 32 bits, threshold code in bits 32-39, code column from bit
    40); the next node is ``child + (code > threshold code)``, and a leaf has code 255 and
    itself as child. Eight levels walk a tree together until all eight sit on leaves. Each level
    starts from its ensemble's baseline and adds its leaf values tree by tree, in the trees'
    order.
    """
    n_cols = cols.size
    width = np.uint64(2 * n_cols)
    n_ens = baselines.size
    n_trees = roots.size
    low = np.uint64(0xFFFFFFFF)
    byte = np.uint64(0xFF)
    s32 = np.uint64(32)
    s40 = np.uint64(40)
    lanes = 8
    sub = 512
    codes = np.zeros(sub * 2 * n_cols, dtype=np.uint8)
    acc = np.empty((sub, n_ens), dtype=np.float64)
    for s0 in range(start, stop, sub):
        m = min(sub, stop - s0)
        for i in range(m):
            row = i * 2 * n_cols
            for j in range(n_cols):
                x = X[s0 + i, cols[j]]
                th = thresholds[j]
                b = 0
                b += 128 * (th[b + 127] < x)
                b += 64 * (th[b + 63] < x)
                b += 32 * (th[b + 31] < x)
                b += 16 * (th[b + 15] < x)
                b += 8 * (th[b + 7] < x)
                b += 4 * (th[b + 3] < x)
                b += 2 * (th[b + 1] < x)
                b += th[b] < x
                missing = x != x
                codes[row + j] = 255 if missing else b
                codes[row + n_cols + j] = 0 if missing else b
        m8 = (m + lanes - 1) // lanes * lanes
        for i in range(m, m8):  # padding levels of the last group: any valid code
            for j in range(2 * n_cols):
                codes[i * 2 * n_cols + j] = 0
        for i in range(m):
            for k in range(n_ens):
                acc[i, k] = baselines[k]
        for i0 in range(0, m8, lanes):
            b0 = np.uint64(i0) * width
            b1 = b0 + width
            b2 = b1 + width
            b3 = b2 + width
            b4 = b3 + width
            b5 = b4 + width
            b6 = b5 + width
            b7 = b6 + width
            for t in range(n_trees):
                r = np.uint64(roots[t])
                n0 = n1 = n2 = n3 = n4 = n5 = n6 = n7 = r
                while True:
                    w0 = words[n0]
                    w1 = words[n1]
                    w2 = words[n2]
                    w3 = words[n3]
                    w4 = words[n4]
                    w5 = words[n5]
                    w6 = words[n6]
                    w7 = words[n7]
                    if ((w0 & w1 & w2 & w3 & w4 & w5 & w6 & w7) >> s32) & byte == byte:
                        break
                    n0 = (w0 & low) + np.uint64(codes[b0 + (w0 >> s40)] > ((w0 >> s32) & byte))
                    n1 = (w1 & low) + np.uint64(codes[b1 + (w1 >> s40)] > ((w1 >> s32) & byte))
                    n2 = (w2 & low) + np.uint64(codes[b2 + (w2 >> s40)] > ((w2 >> s32) & byte))
                    n3 = (w3 & low) + np.uint64(codes[b3 + (w3 >> s40)] > ((w3 >> s32) & byte))
                    n4 = (w4 & low) + np.uint64(codes[b4 + (w4 >> s40)] > ((w4 >> s32) & byte))
                    n5 = (w5 & low) + np.uint64(codes[b5 + (w5 >> s40)] > ((w5 >> s32) & byte))
                    n6 = (w6 & low) + np.uint64(codes[b6 + (w6 >> s40)] > ((w6 >> s32) & byte))
                    n7 = (w7 & low) + np.uint64(codes[b7 + (w7 >> s40)] > ((w7 >> s32) & byte))
                k = tree_ens[t]
                left = m - i0  # padding lanes of the last group are walked but not kept
                acc[i0, k] += values[n0]
                if left > 1:
                    acc[i0 + 1, k] += values[n1]
                if left > 2:
                    acc[i0 + 2, k] += values[n2]
                if left > 3:
                    acc[i0 + 3, k] += values[n3]
                if left > 4:
                    acc[i0 + 4, k] += values[n4]
                if left > 5:
                    acc[i0 + 5, k] += values[n5]
                if left > 6:
                    acc[i0 + 6, k] += values[n6]
                if left > 7:
                    acc[i0 + 7, k] += values[n7]
        for i in range(m):
            for k in range(n_ens):
                out[s0 + i, k] = acc[i, k]


def _count_inf_py(X: NDArray[np.float64]) -> int:  # pragma: no cover - compiled by numba
    """Count the infinite values in `X` (one pass at memory speed, no temporary array)."""
    n = 0
    for i in range(X.shape[0]):
        for j in range(X.shape[1]):
            n += abs(X[i, j]) == np.inf
    return n


def _numba_kernel(name: str = "block") -> Any:
    """Return a compiled kernel, or None when numba is missing or disabled.

    `name` is ``"block"`` (the walker, :func:`_forest_block_py`) or ``"count_inf"``.
    """
    if not USE_NUMBA:
        return None
    if name not in _kernel_cache:
        _kernel_cache[name] = jit_kernel(_forest_block_py if name == "block" else _count_inf_py)
    return _kernel_cache[name]


def map_blocks(block: Callable[[int], T], n: int, size: int, n_threads: int) -> list[T]:
    """``block(start)`` for every block of `size` levels of `n`, on `n_threads` threads.

    Each call handles whole blocks (coarse-grained, so a busy core never stalls the
    others); the kernels called inside release the GIL and write disjoint rows. Results
    come back in block order.
    """
    starts = range(0, n, size)
    if n_threads > 1 and len(starts) > 1:
        from concurrent.futures import ThreadPoolExecutor

        with ThreadPoolExecutor(max_workers=min(n_threads, len(starts))) as pool:
            return list(pool.map(block, starts))
    return [block(start) for start in starts]


def effective_threads(n_threads: int | None) -> int:
    """Threads for a prediction: `n_threads`, or scikit-learn's OpenMP choice when None.

    scikit-learn's choice follows ``threadpoolctl`` limits and ``OMP_NUM_THREADS`` (dask
    workers set it to 1), else the usable cores.
    """
    from sklearn.utils._openmp_helpers import _openmp_effective_n_threads

    return int(_openmp_effective_n_threads(n_threads))


def jit_kernel(func: Any) -> Any:
    """numba-compile `func` (``nogil``), or return None when numba cannot be imported.

    numba is imported here, on first use, so importing qcflag stays fast. Compiled code is
    cached on disk when a cache directory is writable, and compiled anew in memory otherwise.
    """
    try:
        import numba
    except ImportError:  # numba absent or incompatible with this numpy
        return None
    try:
        return numba.njit(nogil=True, cache=True)(func)
    except RuntimeError:  # no writable cache directory
        return numba.njit(nogil=True, cache=False)(func)



class TreeForest:
    """Compiled evaluator of one or more :class:`TreeEnsemble` objects on shared codes.

    Built from the ensembles' arrays (nothing computed at prediction time but the walks).
    Features no split uses are never read; the others are coded once per block of levels
    and shared by all ensembles (the threshold models of a cumulative classifier split on
    the same binned features, so their thresholds coincide).

    Parameters
    ----------
    ensembles : list of TreeEnsemble
        Ensembles over the same input columns.
    """

    def __init__(self, ensembles: list[TreeEnsemble]) -> None:
        self.ensembles = list(ensembles)
        from sklearn.ensemble._hist_gradient_boosting.common import PREDICTOR_RECORD_DTYPE
        from sklearn.ensemble._hist_gradient_boosting.predictor import TreePredictor

        self.n_features = ensembles[0].n_features if ensembles else 0
        self.baselines = [float(e.baseline) for e in ensembles]
        feats = [e.nodes["feature"][~e.nodes["is_leaf"]] for e in ensembles]
        thrs = [e.nodes["threshold"][~e.nodes["is_leaf"]] for e in ensembles]
        allf = np.concatenate(feats) if feats else np.zeros(0, np.int64)
        allt = np.concatenate(thrs) if thrs else np.zeros(0)
        used = np.unique(allf)
        self.dummy = used.size == 0  # no splits at all: one constant column, never read
        if self.dummy:
            used = np.zeros(1, dtype=np.int64)
        self.columns = used
        self.thresholds = [np.unique(allt[allf == f]) for f in used]
        #: codes fit in 8 bits with one left for NaN (always so for HGB's <= 255 bins)
        self.binned = all(t.size < _MISSING_CODE for t in self.thresholds)
        compact = np.zeros(max(self.n_features, int(used.max()) + 1), dtype=np.int64)
        compact[used] = np.arange(used.size)
        empty = np.zeros((0, 8), dtype=np.uint32)
        self.predictors: list[list[Any]] = []
        for e in ensembles:
            nd = e.nodes
            rec = np.zeros(int(e.tree_offsets[-1]), dtype=PREDICTOR_RECORD_DTYPE)
            rec["value"] = nd["value"]
            rec["count"] = nd["count"]
            rec["feature_idx"] = compact[nd["feature"]]
            rec["num_threshold"] = nd["threshold"]
            rec["missing_go_to_left"] = nd["missing_left"]
            rec["left"] = nd["left"]
            rec["right"] = nd["right"]
            rec["is_leaf"] = nd["is_leaf"]
            if self.binned:
                inner = np.flatnonzero(~nd["is_leaf"])
                code = np.zeros(rec.size, dtype=np.int64)
                for j, f in enumerate(used):  # position of each threshold among its feature's
                    sel = inner[nd["feature"][inner] == f]
                    code[sel] = np.searchsorted(self.thresholds[j], nd["threshold"][sel])
                rec["bin_threshold"] = code
            off = e.tree_offsets
            self.predictors.append([
                TreePredictor(rec[int(off[t]):int(off[t + 1])].copy(), empty, empty)
                for t in range(e.n_trees)
            ])
        if self.binned:
            self._build_words(compact)

    def _build_words(self, compact: NDArray[np.int64]) -> None:
        """Arrays of the numba walker: padded thresholds and one 64-bit word per node."""
        n_cols = self.columns.size
        self.padded = np.full((n_cols, 256), np.inf)
        for j, t in enumerate(self.thresholds):
            self.padded[j, :t.size] = t
        offsets, words, values, tree_ens = [np.zeros(1, dtype=np.int64)], [], [], []
        base = 0
        for k, (e, preds) in enumerate(zip(self.ensembles, self.predictors, strict=True)):
            nd = e.nodes
            off = np.asarray(e.tree_offsets, dtype=np.int64)
            code = (np.concatenate([p.nodes["bin_threshold"] for p in preds]) if preds
                    else np.zeros(0, dtype=np.int64)).astype(np.uint64)
            leaf = nd["is_leaf"]
            new = _pair_layout(nd["left"], nd["right"], leaf, off)
            col = (compact[nd["feature"]] + np.where(nd["missing_left"], n_cols, 0)).astype(
                np.uint64)
            child = np.empty(new.size, dtype=np.int64)
            start = np.repeat(off[:-1], np.diff(off))
            child[~leaf] = new[start[~leaf] + nd["left"][~leaf]]
            child[leaf] = new[leaf]  # a leaf steps to itself
            word = np.where(
                leaf, np.uint64(_LEAF_CODE) << np.uint64(32),
                (code << np.uint64(32)) | (col << np.uint64(40)),
            ) | (child + base).astype(np.uint64)
            w = np.empty(new.size, dtype=np.uint64)
            w[new] = word
            v = np.empty(new.size, dtype=np.float64)
            v[new] = nd["value"]
            words.append(w)
            values.append(v)
            offsets.append(off[1:] + base)
            tree_ens.append(np.full(e.n_trees, k, dtype=np.int64))
            base += new.size
        self.words = np.concatenate(words) if words else np.zeros(0, dtype=np.uint64)
        self.values = np.concatenate(values) if values else np.zeros(0)
        self.roots = np.concatenate(offsets)[:-1]
        self.tree_ens = (np.concatenate(tree_ens) if tree_ens
                         else np.zeros(0, dtype=np.int64))

    def __getstate__(self) -> dict[str, Any]:
        """Pickle the ensembles only (scikit-learn's walkers need writable node arrays)."""
        return {"ensembles": self.ensembles}

    def __setstate__(self, state: dict[str, Any]) -> None:
        """Rebuild the evaluator from the pickled ensembles."""
        self.__init__(state["ensembles"])  # type: ignore[misc]

    def raw(self, X: NDArray[np.float64], *, n_threads: int | None = None) -> NDArray[np.float64]:
        """Log-odds of every ensemble, shape (n_samples, n_ensembles).

        Parameters
        ----------
        X : ndarray of shape (n_samples, n_features)
            Raw features; NaN follows each split's missing-value direction.
        n_threads : int, optional
            Threads, each walking whole blocks of levels (default: scikit-learn's OpenMP
            choice, which follows ``threadpoolctl`` limits).
        """
        return self.raw_checked(X, n_threads=n_threads)[0]

    def raw_checked(
        self, X: NDArray[np.float64], *, n_threads: int | None = None
    ) -> tuple[NDArray[np.float64], bool]:
        """:meth:`raw` and whether any value of `X` (any column) is infinite.

        With numba the infinities are counted by a compiled pass over `X` (about a third of
        the cost of scikit-learn's finiteness check); counting them inside the walker
        itself slowed the walks by about 9 %.
        """
        from sklearn.ensemble._hist_gradient_boosting._binning import _map_to_bins
        X = np.asarray(X, dtype=np.float64)
        nt = effective_threads(n_threads)
        n = X.shape[0]
        out = np.empty((n, len(self.predictors)), dtype=np.float64)
        not_cat = np.zeros(self.columns.size, dtype=np.uint8)
        known = np.zeros((0, 8), dtype=np.uint32)
        fmap = np.zeros(self.columns.size, dtype=np.uint32)
        kernel = _numba_kernel() if self.binned and not self.dummy else None
        if kernel is not None:
            X = np.ascontiguousarray(X)
            count = _numba_kernel("count_inf")

        def block(start: int) -> int:
            if kernel is not None:
                kernel(X, start, min(start + BLOCK_LEVELS, n), self.columns, self.padded,
                       self.words, self.values, self.roots, self.tree_ens,
                       np.asarray(self.baselines), out)
                return int(count(X[start:start + BLOCK_LEVELS]))
            stop = min(start + BLOCK_LEVELS, n)
            vals = (np.zeros((stop - start, 1)) if self.dummy
                    else np.ascontiguousarray(X[start:stop, self.columns]))
            if self.binned:
                codes = np.empty(vals.shape, dtype=np.uint8, order="F")
                _map_to_bins(vals, self.thresholds, not_cat, _MISSING_CODE, 1, codes)
            for k, preds in enumerate(self.predictors):
                acc = np.full(stop - start, self.baselines[k])
                if self.binned:
                    for p in preds:
                        acc += p.predict_binned(codes, _MISSING_CODE, 1)
                else:  # pragma: no cover - more than 254 thresholds on one feature
                    for p in preds:
                        acc += p.predict(vals, known, fmap, 1)
                out[start:stop, k] = acc
            return int(np.isinf(X[start:stop]).sum())

        n_inf = sum(map_blocks(block, n, BLOCK_LEVELS, nt))
        return out, n_inf > 0
