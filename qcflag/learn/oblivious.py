"""Gradient-boosted oblivious (symmetric) decision trees, fitted and evaluated here.

An oblivious tree of depth ``D`` asks the same question at every node of one depth: depth
``k`` tests ``x[f_k] > t_k`` for one feature ``f_k`` and one threshold ``t_k``. A level's leaf
is therefore the bit pattern ``sum_k (x[f_k] > t_k) << k`` of its ``D`` answers, and a tree is
evaluated without branches -- ``D`` comparisons of raw float64 values with float thresholds
and one table look-up -- the same way for a whole block of levels (Langley & Sage 1994 named
these trees; boosting them follows Friedman 2001).

Missing values
--------------
NaN always goes to the *greater* side (bit 1): a split asks ``not (x <= t)``, which is true
for NaN, both when fitting (NaN has the highest bin code) and when predicting. The highest
candidate threshold of a feature is ``+inf`` ("is missing"), so a tree can still separate
missing from present values.

Fitting (:func:`fit_oblivious`)
-------------------------------
Binary logistic loss, Newton boosting: starting from the weighted log-odds of the target,
each tree is grown on the gradients ``g = w (p - y)`` and hessians ``h = w p (1 - p)`` of the
current scores (on a seeded random share of the levels when ``subsample < 1``). Features are
coded once into 8-bit bins (:func:`bin_edges`, :func:`bin_codes`); at each depth the single
(feature, bin) split is chosen that maximises the loss reduction summed over all current
leaves, ``sum_l GL^2/(HL+lambda) + GR^2/(HR+lambda) - G^2/(H+lambda)``, among splits that
leave at least ``min_child_weight`` of hessian on each side (summed over the leaves); ties go
to the lowest feature, then the lowest threshold. When no split gains, the depth gets a
"no split" (threshold NaN: every level takes bit 1). Per-leaf histograms of ``g`` and ``h``
are built for the smaller child of each split only; the other child is its parent minus it.
Leaf values are ``-learning_rate * G / (H + lambda)``.

Bins: the edges of a feature are the midpoints between its distinct finite values when it
has at most 255 of them, else 254 of its quantiles (from at most 200,000 levels);
``code(x)`` is the number of edges below ``x`` (NaN: 255). Since the edges increase strictly,
``code(x) <= t`` holds exactly when ``x <= edges[t]``, so the stored float threshold
``edges[t]`` reproduces the fitted split on raw values (the tests check values on the edges).

Evaluation
----------
:class:`ObliviousForest` stacks any number of ensembles of one depth; a numba kernel of our
own (imported on first use, like :mod:`qcflag.learn.trees`) evaluates blocks of levels, trees
outer and levels inner so the comparisons vectorise. The kernel codes each value into 8 bits
first -- the number of its column's distinct split thresholds below it, NaN 255 -- so that
``not (x <= t)`` becomes ``code(x) >= rank(t) + 1`` and the comparisons run on bytes; forests
deeper than 8 or with more than 255 thresholds on one column go to a kernel that compares raw
float64 values. Both count the infinite values they read, so prediction needs no separate
finiteness scan of its input. Without numba (or with ``USE_NUMBA = False``) a numpy evaluator
does the same operations in the same order; all give the same bits. The fitting kernels have
numpy twins as well (same summation order, same fitted model).

References
----------
Langley, P. and Sage, S. (1994). Oblivious decision trees and abstract cases. Working Notes
of the AAAI-94 Workshop on Case-Based Reasoning, 113-117.

Friedman, J. H. (2001). Greedy function approximation: a gradient boosting machine. Annals
of Statistics 29(5), 1189-1232.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

import numpy as np

from qcflag.learn.trees import effective_threads, expit, jit_kernel, map_blocks

if TYPE_CHECKING:
    from numpy.typing import NDArray

__all__ = [
    "MISSING_CODE",
    "ObliviousEnsemble",
    "ObliviousForest",
    "bin_codes",
    "bin_edges",
    "fit_oblivious",
]

MISSING_CODE = 255
"""Bin code of NaN (above every finite code, so NaN goes to the greater side)."""
MAX_DEPTH = 12
"""Deepest tree accepted (4096 leaves)."""
#: use the numba kernels when numba imports (tests set it False to force the numpy twins)
USE_NUMBA = True
#: levels per block handed to the prediction kernel
BLOCK_LEVELS = 16_384
_EDGE_SAMPLE = 200_000
_kernels: dict[str, Any] = {}


# ------------------------------------------------------------------------------ binning
def bin_edges(
    X: NDArray[np.float64], *, max_bins: int = 255, sample: int = _EDGE_SAMPLE, seed: int = 0
) -> list[NDArray[np.float64]]:
    """Strictly increasing bin edges of every column (at most ``max_bins - 1`` each).

    Parameters
    ----------
    X : ndarray of shape (n_samples, n_features)
        Raw features (NaN ignored).
    max_bins : int, default=255
        Bins of finite values (codes ``0 .. n_edges``); at most 255 (code 255 is NaN).
    sample : int, default=200_000
        Quantiles come from at most this many levels (a seeded random choice).
    seed : int, default=0
        Seed of that choice.

    Returns
    -------
    list of ndarray
        Edges of each column: midpoints between consecutive distinct values when there are
        at most `max_bins` of them, else the distinct inner quantiles.
    """
    if not 2 <= max_bins <= 255:
        raise ValueError(f"max_bins must be in 2..255, got {max_bins}")
    X = np.asarray(X, dtype=np.float64)
    if X.shape[0] > sample:
        rows = np.sort(np.random.default_rng(seed).choice(X.shape[0], sample, replace=False))
        X = X[rows]
    edges = []
    probs = np.linspace(0.0, 1.0, max_bins + 1)[1:-1]
    for j in range(X.shape[1]):  # loop over feature columns, not levels
        col = X[:, j]
        vals = np.unique(col[np.isfinite(col)])
        if vals.size <= max_bins:
            a, b = vals[:-1], vals[1:]
            mid = a + (b - a) * 0.5
            e = np.where((mid >= a) & (mid < b), mid, a)  # keeps a left and b right
        else:
            e = np.unique(np.quantile(vals, probs))
        edges.append(np.ascontiguousarray(e, dtype=np.float64))
    return edges


def bin_codes(X: NDArray[np.float64], edges: list[NDArray[np.float64]]) -> NDArray[np.uint8]:
    """8-bit codes, shape (n_features, n_samples): edges below each value, NaN -> 255."""
    X = np.asarray(X, dtype=np.float64)
    codes = np.empty((X.shape[1], X.shape[0]), dtype=np.uint8)
    for j, e in enumerate(edges):  # loop over feature columns
        col = X[:, j]
        c = np.searchsorted(e, col, side="left")
        c[np.isnan(col)] = MISSING_CODE
        codes[j] = c
    return codes


def _code_thresholds(edges: list[NDArray[np.float64]]) -> NDArray[np.float64]:
    """Float threshold of every (feature, code) split, shape (n_features, 256).

    Code ``t < n_edges`` is ``edges[t]``, code ``n_edges`` is ``+inf`` (present vs missing);
    unused codes are NaN.
    """
    out = np.full((len(edges), 256), np.nan)
    for j, e in enumerate(edges):
        out[j, :e.size] = e
        out[j, e.size] = np.inf
    return out


# ---------------------------------------------------------------------------- ensemble
@dataclass
class ObliviousEnsemble:
    """Additive ensemble of oblivious trees on the log-odds scale.

    Parameters
    ----------
    baseline : float
        Initial log-odds.
    features : ndarray of int64, shape (n_trees, depth)
        Feature tested at each depth of each tree.
    thresholds : ndarray of float64, shape (n_trees, depth)
        The level takes bit ``k`` when ``not (x[features[t, k]] <= thresholds[t, k])`` (NaN
        values and NaN thresholds give bit 1).
    leaf_values : ndarray of float64, shape (n_trees, 2 ** depth)
        Added to the log-odds of a level in leaf ``sum_k bit_k << k``.
    leaf_weights : ndarray of float64, shape (n_trees, 2 ** depth)
        Training hessian sums of the leaves (weights of the path attributions).
    n_features : int
        Number of input columns.
    """

    baseline: float
    features: NDArray[np.int64]
    thresholds: NDArray[np.float64]
    leaf_values: NDArray[np.float64]
    leaf_weights: NDArray[np.float64]
    n_features: int
    _cache: ObliviousForest | None = field(default=None, repr=False, compare=False)

    _ARRAYS = ("features", "thresholds", "leaf_values", "leaf_weights")

    @property
    def n_trees(self) -> int:
        """Number of trees."""
        return int(self.features.shape[0])

    @property
    def depth(self) -> int:
        """Depth of every tree."""
        return int(self.features.shape[1])

    def validate(self) -> None:
        """Check dtypes, shapes, feature indices and that values are finite.

        Raises
        ------
        ValueError
            On any inconsistency (the store turns it into ``ModelFileError``).
        """
        f, t = np.asarray(self.features), np.asarray(self.thresholds)
        v, w = np.asarray(self.leaf_values), np.asarray(self.leaf_weights)
        if f.dtype != np.int64 or t.dtype != np.float64 or v.dtype != np.float64 \
                or w.dtype != np.float64:
            raise ValueError("oblivious tree arrays have unexpected dtypes")
        if f.ndim != 2 or not 1 <= f.shape[1] <= MAX_DEPTH or t.shape != f.shape:
            raise ValueError("oblivious tree features/thresholds are not (n_trees, depth) "
                             f"with depth 1..{MAX_DEPTH}")
        if v.shape != (f.shape[0], 1 << f.shape[1]) or w.shape != v.shape:
            raise ValueError("oblivious leaf arrays are not (n_trees, 2 ** depth)")
        if not isinstance(self.n_features, int) or self.n_features < 1:
            raise ValueError("n_features must be a positive integer")
        if ((f < 0) | (f >= self.n_features)).any():
            raise ValueError("a split refers to a feature the model does not have")
        if not np.isfinite(v).all() or not np.isfinite(w).all() or (w < 0).any():
            raise ValueError("leaf values or weights are not finite and non-negative")
        if not np.isfinite(self.baseline):
            raise ValueError("baseline is not finite")

    def __getstate__(self) -> dict[str, Any]:
        """Pickle the arrays only; the evaluator is rebuilt when needed."""
        return {**self.__dict__, "_cache": None}

    def raw(self, X: NDArray[np.float64]) -> NDArray[np.float64]:
        """Log-odds of the positive class, shape (n_samples,)."""
        if self._cache is None:
            self._cache = ObliviousForest([self])
        return self._cache.raw(X)[:, 0]

    def leaves(self, X: NDArray[np.float64]) -> NDArray[np.int64]:
        """Leaf of every sample in every tree, shape (n_samples, n_trees) (numpy)."""
        X = np.asarray(X, dtype=np.float64)
        out = np.zeros((X.shape[0], self.n_trees), dtype=np.int64)
        for k in range(self.depth):  # loop over depths, vectorised over levels and trees
            bit = ~(X[:, self.features[:, k]] <= self.thresholds[:, k])
            out |= bit.astype(np.int64) << k
        return out

    def prefix_means(self) -> list[NDArray[np.float64]]:
        """Weighted mean leaf value of every reachable leaf set, per depth.

        Entry ``k`` has shape (n_trees, 2 ** k): after the splits of depths ``0 .. k-1`` a
        level whose leaf has low bits ``r`` can still reach the leaves ``r + 2 ** k * i``;
        their mean, weighted by ``leaf_weights`` (unweighted when those are all zero).
        Entry 0 is the tree's expected value, entry ``depth`` its leaf values.
        """
        n, D = self.n_trees, self.depth
        v, w = self.leaf_values, self.leaf_weights
        out = []
        for k in range(D + 1):
            vv = v.reshape(n, 1 << (D - k), 1 << k)
            ww = w.reshape(n, 1 << (D - k), 1 << k)
            sw = ww.sum(axis=1)
            swv = (ww * vv).sum(axis=1)
            plain = vv.mean(axis=1)
            with np.errstate(invalid="ignore", divide="ignore"):
                out.append(np.where(sw > 0, swv / np.where(sw > 0, sw, 1.0), plain))
        return out

    def contributions(self, X: NDArray[np.float64]) -> NDArray[np.float64]:
        """Per-feature path attributions of the log-odds, shape (n_samples, n_features).

        In each tree, the split at depth ``k`` credits its feature with the change of the
        weighted mean leaf value of the leaves a level can still reach (:meth:`prefix_means`)
        when the split is applied. Rows sum to ``raw(X) - baseline - sum of the trees'
        expected values`` (``prefix_means()[0]``).
        """
        X = np.asarray(X, dtype=np.float64)
        leaf = self.leaves(X)
        means = self.prefix_means()
        out = np.zeros((X.shape[0], self.n_features), dtype=np.float64)
        for t in range(self.n_trees):  # loop over trees and depths, vectorised over levels
            prev = np.full(X.shape[0], means[0][t, 0])
            for k in range(self.depth):
                nxt = means[k + 1][t][leaf[:, t] & ((1 << (k + 1)) - 1)]
                out[:, self.features[t, k]] += nxt - prev
                prev = nxt
        return out

    # ------------------------------------------------------------ persistence
    def to_arrays(self, prefix: str) -> tuple[dict[str, Any], dict[str, NDArray[Any]]]:
        """JSON-able scalars and named arrays, for the model store."""
        arrays = {f"{prefix}{k}": np.asarray(getattr(self, k)) for k in self._ARRAYS}
        return {"baseline": float(self.baseline), "n_features": int(self.n_features)}, arrays

    @classmethod
    def from_arrays(
        cls, meta: dict[str, Any], arrays: dict[str, NDArray[Any]], prefix: str
    ) -> ObliviousEnsemble:
        """Inverse of :meth:`to_arrays`; validates the result."""
        ens = cls(float(meta["baseline"]), *(arrays[f"{prefix}{k}"] for k in cls._ARRAYS),
                  n_features=int(meta["n_features"]))
        ens.validate()
        return ens


# ---------------------------------------------------------------------------- kernels
def _predict_block_py(  # pragma: no cover - runs compiled by numba (see _kernel)
    X: NDArray[np.float64], start: int, stop: int, cols: NDArray[np.int64],
    feats: NDArray[np.int64], thrs: NDArray[np.float64], values: NDArray[np.float64],
    tree_ens: NDArray[np.int64], baselines: NDArray[np.float64], out: NDArray[np.float64],
) -> int:
    """Evaluate levels ``start:stop`` of `X` into ``out[start:stop]`` (numba kernel).

    The float kernel, for forests the 8-bit kernel (:func:`_predict_codes_py`) cannot take.
    Levels go 256 at a time: the used columns (`cols`; `feats` index into them) are copied
    into a column-major buffer, then for each tree the comparisons run over all 256 levels
    (vectorised), up to four depths per pass, and the leaf values are added tree by tree in
    the trees' order. Returns the number of infinite values in rows ``start:stop`` of `X`
    (all columns), so the caller can skip a separate finiteness scan.
    """
    n_trees, depth = feats.shape
    n_cols = cols.size
    n_ens = baselines.size
    sub = 256
    # rows padded past 2 KiB multiples: the copy's column writes do not all hit one cache set
    xt = np.empty((n_cols, sub + 8), dtype=np.float64)
    leaf = np.zeros(sub, dtype=np.uint64)  # unsigned: no negative-index wraparound code
    one, two, three = np.uint64(1), np.uint64(2), np.uint64(3)
    acc = np.empty((n_ens, sub + 8), dtype=np.float64)
    n_inf = 0
    for s0 in range(start, stop, sub):
        m = min(sub, stop - s0)
        if X.strides[0] >= X.strides[1]:  # levels are rows (C order)
            for i in range(s0, s0 + m):
                for j in range(X.shape[1]):
                    n_inf += abs(X[i, j]) == np.inf
        else:  # columns are contiguous (F order)
            for j in range(X.shape[1]):
                for i in range(s0, s0 + m):
                    n_inf += abs(X[i, j]) == np.inf
        for i in range(m):
            for j in range(n_cols):
                xt[j, i] = X[s0 + i, cols[j]]
        for k in range(n_ens):
            for i in range(m):
                acc[k, i] = baselines[k]
        for t in range(n_trees):
            # the depths in passes of up to four comparisons per level (fewer trips of
            # `leaf` through memory); `keep` clears the leaf on the first pass
            keep = np.uint64(0)
            d = 0
            while d < depth:
                r = depth - d
                sh = np.uint64(d)
                f0, t0 = feats[t, d], thrs[t, d]
                if r >= 4:
                    f1, t1 = feats[t, d + 1], thrs[t, d + 1]
                    f2, t2 = feats[t, d + 2], thrs[t, d + 2]
                    f3, t3 = feats[t, d + 3], thrs[t, d + 3]
                    for i in range(m):
                        b = (np.uint64(not (xt[f0, i] <= t0))
                             | (np.uint64(not (xt[f1, i] <= t1)) << one)
                             | (np.uint64(not (xt[f2, i] <= t2)) << two)
                             | (np.uint64(not (xt[f3, i] <= t3)) << three))
                        leaf[i] = (leaf[i] & keep) | (b << sh)
                    d += 4
                elif r == 3:
                    f1, t1 = feats[t, d + 1], thrs[t, d + 1]
                    f2, t2 = feats[t, d + 2], thrs[t, d + 2]
                    for i in range(m):
                        b = (np.uint64(not (xt[f0, i] <= t0))
                             | (np.uint64(not (xt[f1, i] <= t1)) << one)
                             | (np.uint64(not (xt[f2, i] <= t2)) << two))
                        leaf[i] = (leaf[i] & keep) | (b << sh)
                    d += 3
                elif r == 2:
                    f1, t1 = feats[t, d + 1], thrs[t, d + 1]
                    for i in range(m):
                        b = (np.uint64(not (xt[f0, i] <= t0))
                             | (np.uint64(not (xt[f1, i] <= t1)) << one))
                        leaf[i] = (leaf[i] & keep) | (b << sh)
                    d += 2
                else:
                    for i in range(m):
                        leaf[i] = (leaf[i] & keep) | (np.uint64(not (xt[f0, i] <= t0)) << sh)
                    d += 1
                keep = ~np.uint64(0)
            k = tree_ens[t]
            vt = values[t]
            for i in range(m):
                acc[k, i] += vt[leaf[i]]
        for i in range(m):
            for k in range(n_ens):
                out[s0 + i, k] = acc[k, i]
    return n_inf


def _predict_codes_py(  # pragma: no cover - runs compiled by numba (see _kernel)
    X: NDArray[np.float64], start: int, stop: int, cols: NDArray[np.int64],
    table: NDArray[np.float64], n_thr: NDArray[np.int64], feats: NDArray[np.int64],
    tcodes: NDArray[np.uint8], values: NDArray[np.float64], groups: NDArray[np.int64],
    group_ens: NDArray[np.int64], baselines: NDArray[np.float64], out: NDArray[np.float64],
) -> int:
    """Evaluate levels ``start:stop`` of `X` on 8-bit codes into ``out[start:stop]``.

    Levels go 512 at a time. Coding: the used columns (`cols`) are copied into a
    column-major buffer; a value's code is the number of its column's distinct split
    thresholds (``table[j, :n_thr[j]]``, increasing, padded with +inf) below it, and 255
    for NaN. Then ``not (x <= t)`` holds exactly when ``code(x) >= tcodes`` (the position
    of ``t`` among the thresholds plus one; 0 for a "no split" NaN threshold), so the
    comparisons of every tree and depth run on bytes, 64 levels per vector instruction
    where raw float64 values give 8. Columns with at most 64 thresholds are coded by
    counting, vectorised over the levels, the others by a branch-free binary search.
    Leaves are built most significant depths first (``leaf << 3 | three bits``: constant
    shifts). Trees go in groups of up to four of one ensemble (``groups``: first tree of
    each group and an end marker; ``group_ens``: their ensemble); a group's leaf values
    are added to each level's sum in one pass, tree by tree in the trees' order, so the
    sums have the bits of the float kernel's. Returns the number of infinite values in
    rows ``start:stop`` of `X` (all columns).
    """
    depth = feats.shape[1]
    n_cols = cols.size
    n_ens = baselines.size
    sub = 512
    pad = sub + 8  # rows past 4 KiB multiples: column writes spread over cache sets
    xt = np.empty((n_cols, pad), dtype=np.float64)
    codes = np.empty((n_cols, sub), dtype=np.uint8)
    cnt = np.empty(sub, dtype=np.int64)
    leaf = np.zeros((4, sub), dtype=np.uint8)
    acc = np.empty((n_ens, pad), dtype=np.float64)
    top = depth - 3 * ((depth - 1) // 3)  # depths of the first (most significant) pass
    n_inf = 0
    for s0 in range(start, stop, sub):
        m = min(sub, stop - s0)
        if X.strides[0] >= X.strides[1]:  # levels are rows (C order)
            for i in range(s0, s0 + m):
                for j in range(X.shape[1]):
                    n_inf += abs(X[i, j]) == np.inf
        else:  # columns are contiguous (F order)
            for j in range(X.shape[1]):
                for i in range(s0, s0 + m):
                    n_inf += abs(X[i, j]) == np.inf
        for i0 in range(0, m, 8):  # eight levels per column: whole cache lines written
            q1 = min(8, m - i0)
            for j in range(n_cols):
                c = cols[j]
                for q in range(q1):
                    xt[j, i0 + q] = X[s0 + i0 + q, c]
        for j in range(n_cols):
            th = table[j]
            xb = xt[j]
            cj = codes[j]
            n = n_thr[j]
            if n <= 64:
                for i in range(m):
                    cnt[i] = 0
                k = 0
                while k + 8 <= n:
                    t0, t1, t2, t3 = th[k], th[k + 1], th[k + 2], th[k + 3]
                    t4, t5, t6, t7 = th[k + 4], th[k + 5], th[k + 6], th[k + 7]
                    for i in range(m):
                        x = xb[i]
                        cnt[i] += (((np.int64(t0 < x) + np.int64(t1 < x))
                                    + (np.int64(t2 < x) + np.int64(t3 < x)))
                                   + ((np.int64(t4 < x) + np.int64(t5 < x))
                                      + (np.int64(t6 < x) + np.int64(t7 < x))))
                    k += 8
                while k < n:
                    tk = th[k]
                    for i in range(m):
                        cnt[i] += tk < xb[i]
                    k += 1
                for i in range(m):
                    cj[i] = 255 if xb[i] != xb[i] else cnt[i]
            else:
                for i in range(m):
                    x = xb[i]
                    b = 0
                    b += 128 * (th[b + 127] < x)
                    b += 64 * (th[b + 63] < x)
                    b += 32 * (th[b + 31] < x)
                    b += 16 * (th[b + 15] < x)
                    b += 8 * (th[b + 7] < x)
                    b += 4 * (th[b + 3] < x)
                    b += 2 * (th[b + 1] < x)
                    b += th[b] < x
                    cj[i] = 255 if x != x else b
        for k in range(n_ens):
            for i in range(m):
                acc[k, i] = baselines[k]
        for g in range(groups.size - 1):
            t_first = groups[g]
            n_g = groups[g + 1] - t_first
            for q in range(n_g):  # rows indexed in 2-D, not taken as views (~10 % faster)
                t = t_first + q
                hi = depth
                r = top
                while hi > 0:
                    lo = hi - r
                    f0, u0 = feats[t, lo], tcodes[t, lo]
                    if r == 3:
                        f1, u1 = feats[t, lo + 1], tcodes[t, lo + 1]
                        f2, u2 = feats[t, lo + 2], tcodes[t, lo + 2]
                        if hi == depth:
                            for i in range(m):
                                leaf[q, i] = (np.uint8(codes[f0, i] >= u0)
                                              | (np.uint8(codes[f1, i] >= u1) << 1)
                                              | (np.uint8(codes[f2, i] >= u2) << 2))
                        else:
                            for i in range(m):
                                leaf[q, i] = ((leaf[q, i] << 3)
                                              | np.uint8(codes[f0, i] >= u0)
                                              | (np.uint8(codes[f1, i] >= u1) << 1)
                                              | (np.uint8(codes[f2, i] >= u2) << 2))
                    elif r == 2:
                        f1, u1 = feats[t, lo + 1], tcodes[t, lo + 1]
                        for i in range(m):
                            leaf[q, i] = (np.uint8(codes[f0, i] >= u0)
                                          | (np.uint8(codes[f1, i] >= u1) << 1))
                    else:
                        for i in range(m):
                            leaf[q, i] = np.uint8(codes[f0, i] >= u0)
                    hi = lo
                    r = 3
            ak = acc[group_ens[g]]
            if n_g == 4:
                v0, v1, v2, v3 = (values[t_first], values[t_first + 1], values[t_first + 2],
                                  values[t_first + 3])
                l0, l1, l2, l3 = leaf[0], leaf[1], leaf[2], leaf[3]
                for i in range(m):
                    ak[i] = (((ak[i] + v0[l0[i]]) + v1[l1[i]]) + v2[l2[i]]) + v3[l3[i]]
            else:
                for q in range(n_g):
                    vq = values[t_first + q]
                    lq = leaf[q]
                    for i in range(m):
                        ak[i] += vq[lq[i]]
        for i in range(m):
            for k in range(n_ens):
                out[s0 + i, k] = acc[k, i]
    return n_inf

def _predict_rows_py(  # pragma: no cover - runs compiled by numba; the slower variant
    X: NDArray[np.float64], start: int, stop: int, cols: NDArray[np.int64],
    feats: NDArray[np.int64], thrs: NDArray[np.float64], values: NDArray[np.float64],
    tree_ens: NDArray[np.int64], baselines: NDArray[np.float64], out: NDArray[np.float64],
) -> None:
    """Levels outer, trees inner: the alternative loop order (kept for the benchmark)."""
    n_trees, depth = feats.shape
    n_ens = baselines.size
    acc = np.empty(n_ens, dtype=np.float64)
    for i in range(start, stop):
        for k in range(n_ens):
            acc[k] = baselines[k]
        for t in range(n_trees):
            leaf = 0
            for d in range(depth):
                leaf |= np.int64(not (X[i, cols[feats[t, d]]] <= thrs[t, d])) << d
            acc[tree_ens[t]] += values[t, leaf]
        for k in range(n_ens):
            out[i, k] = acc[k]


def _hist_py(  # pragma: no cover - runs compiled by numba
    codes: NDArray[np.uint8], rows: NDArray[np.int64], slot: NDArray[np.int64],
    g: NDArray[np.float64], h: NDArray[np.float64], hist: NDArray[np.float64],
) -> None:
    """Add ``g[q]``/``h[q]`` into ``hist[j, slot[q], codes[j, rows[q]], 0/1]`` in order."""
    for j in range(codes.shape[0]):
        cj = codes[j]
        hj = hist[j]
        for q in range(rows.size):
            c = cj[rows[q]]
            s = slot[q]
            hj[s, c, 0] += g[q]
            hj[s, c, 1] += h[q]


def _children_py(  # pragma: no cover - runs compiled by numba
    hist: NDArray[np.float64], n_leaves: int, small_hi: NDArray[np.bool_],
) -> None:
    """Replace each parent and its built smaller child by the two children's histograms.

    Slot ``p`` holds the parent, slot ``p + n_leaves`` the smaller child (bit 1 when
    ``small_hi[p]``); afterwards slot ``p`` holds bit 0 and slot ``p + n_leaves`` bit 1.
    """
    for j in range(hist.shape[0]):
        for p in range(n_leaves):
            hi = small_hi[p]
            for b in range(256):
                for c in range(2):
                    built = hist[j, p + n_leaves, b, c]
                    other = hist[j, p, b, c] - built
                    if hi:
                        hist[j, p, b, c] = other
                    else:
                        hist[j, p, b, c] = built
                        hist[j, p + n_leaves, b, c] = other


def _split_py(  # pragma: no cover - runs compiled by numba
    hist: NDArray[np.float64], n_leaves: int, n_cand: NDArray[np.int64], lam: float,
    min_child: float,
) -> tuple[int, int, float]:
    """Best (feature, code, gain) summed over the leaves; (-1, -1, 0.0) when none gains."""
    best_f, best_t, best = -1, -1, 0.0
    cg = np.empty((n_leaves, 256))
    ch = np.empty((n_leaves, 256))
    for j in range(hist.shape[0]):
        for lf in range(n_leaves):
            sg = 0.0
            sh = 0.0
            for b in range(256):
                sg += hist[j, lf, b, 0]
                sh += hist[j, lf, b, 1]
                cg[lf, b] = sg
                ch[lf, b] = sh
        parent = 0.0
        for lf in range(n_leaves):
            parent += cg[lf, 255] * cg[lf, 255] / (ch[lf, 255] + lam)
        for t in range(n_cand[j]):
            gain = 0.0
            hl = 0.0
            hr = 0.0
            for lf in range(n_leaves):
                gl = cg[lf, t]
                gr = cg[lf, 255] - gl
                hl_ = ch[lf, t]
                hr_ = ch[lf, 255] - hl_
                gain += gl * gl / (hl_ + lam) + gr * gr / (hr_ + lam)
                hl += hl_
                hr += hr_
            gain -= parent
            if hl >= min_child and hr >= min_child and gain > best:
                best_f, best_t, best = j, t, gain
    return best_f, best_t, best


def _apply_py(  # pragma: no cover - runs compiled by numba
    codes: NDArray[np.uint8], feats: NDArray[np.int64], tcodes: NDArray[np.int64],
    values: NDArray[np.float64], F: NDArray[np.float64],
) -> None:
    """Add each level's leaf value (leaf from its codes) to its score ``F``."""
    depth = feats.size
    for i in range(F.size):
        leaf = 0
        for d in range(depth):
            leaf |= np.int64(np.int64(codes[feats[d], i]) > tcodes[d]) << d
        F[i] += values[leaf]


def _kernel(name: str) -> Any:
    """Compiled kernel `name`, or None when numba is missing or disabled."""
    if not USE_NUMBA:
        return None
    if name not in _kernels:
        _kernels[name] = jit_kernel(globals()[f"_{name}_py"])
    return _kernels[name]


# ------------------------------------------------------------------- numpy twins (fit)
def _hist_np(codes: NDArray[np.uint8], rows: NDArray[np.int64], slot: NDArray[np.int64],
             g: NDArray[np.float64], h: NDArray[np.float64], hist: NDArray[np.float64]) -> None:
    n_slots = hist.shape[1]
    for j in range(codes.shape[0]):  # loop over features; bincount adds in row order
        idx = slot * 256 + codes[j, rows]
        hist[j, :, :, 0] += np.bincount(idx, g, n_slots * 256).reshape(n_slots, 256)
        hist[j, :, :, 1] += np.bincount(idx, h, n_slots * 256).reshape(n_slots, 256)


def _children_np(hist: NDArray[np.float64], n_leaves: int, small_hi: NDArray[np.bool_]
                 ) -> None:
    built = hist[:, n_leaves:2 * n_leaves].copy()
    other = hist[:, :n_leaves] - built
    hi = small_hi[None, :, None, None]
    hist[:, :n_leaves] = np.where(hi, other, built)
    hist[:, n_leaves:2 * n_leaves] = np.where(hi, built, other)


def _split_np(hist: NDArray[np.float64], n_leaves: int, n_cand: NDArray[np.int64],
              lam: float, min_child: float) -> tuple[int, int, float]:
    best_f, best_t, best = -1, -1, 0.0
    for j in range(hist.shape[0]):  # loop over features; leaves summed in order
        cg = np.cumsum(hist[j, :n_leaves, :, 0], axis=1)
        ch = np.cumsum(hist[j, :n_leaves, :, 1], axis=1)
        parent = 0.0
        for lf in range(n_leaves):
            parent += cg[lf, 255] * cg[lf, 255] / (ch[lf, 255] + lam)
        nc = int(n_cand[j])
        gain = np.zeros(nc)
        hl = np.zeros(nc)
        hr = np.zeros(nc)
        for lf in range(n_leaves):
            gl, hl_ = cg[lf, :nc], ch[lf, :nc]
            gr, hr_ = cg[lf, 255] - gl, ch[lf, 255] - hl_
            gain += gl * gl / (hl_ + lam) + gr * gr / (hr_ + lam)
            hl += hl_
            hr += hr_
        gain -= parent
        ok = np.flatnonzero((hl >= min_child) & (hr >= min_child) & (gain > best))
        if ok.size:
            t = int(ok[np.argmax(gain[ok])])
            best_f, best_t, best = j, t, float(gain[t])
    return best_f, best_t, best


def _apply_np(codes: NDArray[np.uint8], feats: NDArray[np.int64], tcodes: NDArray[np.int64],
              values: NDArray[np.float64], F: NDArray[np.float64]) -> None:
    leaf = np.zeros(F.size, dtype=np.int64)
    for d in range(feats.size):
        leaf |= (codes[feats[d]].astype(np.int64) > tcodes[d]).astype(np.int64) << d
    F += values[leaf]


def _fit_kernels() -> tuple[Any, ...]:
    ks = (_kernel("hist"), _kernel("split"), _kernel("apply"), _kernel("children"))
    if any(k is None for k in ks):
        return _hist_np, _split_np, _apply_np, _children_np
    return ks


# ------------------------------------------------------------------------------ fitting
def _grow(
    codes: NDArray[np.uint8], rows: NDArray[np.int64], g: NDArray[np.float64],
    h: NDArray[np.float64], n_cand: NDArray[np.int64], depth: int, lam: float,
    min_child: float, hist: NDArray[np.float64], kernels: tuple[Any, ...],
) -> tuple[NDArray[np.int64], NDArray[np.int64], NDArray[np.float64], NDArray[np.float64]]:
    """Grow one oblivious tree on rows `rows` (gradients `g`, hessians `h` of those rows).

    Returns the feature and code of each depth (code -1: no split, every row takes bit 1)
    and the gradient and hessian sums of the leaves.
    """
    hist_k, split_k, _, children_k = kernels
    m = rows.size
    leaf = np.zeros(m, dtype=np.int64)
    feats = np.zeros(depth, dtype=np.int64)
    tcodes = np.full(depth, -1, dtype=np.int64)
    hist[:, :1] = 0.0
    hist_k(codes, rows, np.zeros(m, dtype=np.int64), g, h, hist)
    for d in range(depth):
        n_leaves = 1 << d
        f, t, _ = split_k(hist, n_leaves, n_cand, lam, min_child)
        if f >= 0:
            feats[d], tcodes[d] = f, t
            bit = (codes[f, rows] > t).astype(np.int64)
        else:
            bit = np.ones(m, dtype=np.int64)
        leaf |= bit << d
        if d == depth - 1:
            break
        # next depth: build the smaller child of every leaf into slot leaf + 2**d,
        # subtract it from its parent, and put the two children in their own slots
        cnt = np.bincount(leaf, minlength=2 * n_leaves)
        small_hi = cnt[n_leaves:] <= cnt[:n_leaves]  # per parent: is bit 1 the smaller?
        parent = leaf & (n_leaves - 1)
        sel = np.flatnonzero((leaf >= n_leaves) == small_hi[parent])
        hist[:, n_leaves:2 * n_leaves] = 0.0
        hist_k(codes, rows[sel], parent[sel] + n_leaves, g[sel], h[sel], hist)
        children_k(hist, n_leaves, small_hi)
    n_leaf = 1 << depth
    G = np.bincount(leaf, g, n_leaf)
    H = np.bincount(leaf, h, n_leaf)
    return feats, tcodes, G, H


def fit_oblivious(
    codes: NDArray[np.uint8], edges: list[NDArray[np.float64]], y: NDArray[Any],
    sample_weight: NDArray[np.float64], *, n_trees: int = 200, depth: int = 6,
    learning_rate: float = 0.1, l2_regularization: float = 1.0,
    min_child_weight: float = 1.0, subsample: float = 1.0, random_state: Any = 0,
) -> ObliviousEnsemble:
    """Boost oblivious trees with the binary logistic loss (see the module docstring).

    Parameters
    ----------
    codes : ndarray of uint8, shape (n_features, n_samples)
        Bin codes from :func:`bin_codes`.
    edges : list of ndarray
        The edges the codes were made with (become the float thresholds).
    y : ndarray of shape (n_samples,)
        Binary target (0/1 or bool).
    sample_weight : ndarray of shape (n_samples,)
        Non-negative weights.
    n_trees, depth : int
        Trees and their depth.
    learning_rate : float
        Shrinkage of the leaf values.
    l2_regularization : float
        The ``lambda`` of the leaf values and gains.
    min_child_weight : float
        Hessian each side of a split must keep, summed over the leaves.
    subsample : float
        Share of the levels each tree is grown on (seeded; 1 = all).
    random_state : int, sequence of int or None
        Seed of the subsamples (anything :func:`numpy.random.default_rng` takes).

    Returns
    -------
    ObliviousEnsemble
    """
    if not 1 <= depth <= MAX_DEPTH:
        raise ValueError(f"depth must be in 1..{MAX_DEPTH}, got {depth}")
    if n_trees < 0 or not 0.0 < subsample <= 1.0 or l2_regularization < 0:
        raise ValueError("n_trees must be >= 0, subsample in (0, 1], l2_regularization >= 0")
    p, n = codes.shape
    yf = np.asarray(y, dtype=np.float64)
    w = np.asarray(sample_weight, dtype=np.float64)
    pos = float(np.sum(w * yf)) / max(float(np.sum(w)), 1e-300)
    pos = min(max(pos, 1e-12), 1.0 - 1e-12)
    baseline = float(np.log(pos / (1.0 - pos)))
    F = np.full(n, baseline)
    n_cand = np.array([e.size + 1 for e in edges], dtype=np.int64)
    thr_of = _code_thresholds(edges)
    kernels = _fit_kernels()
    hist = np.zeros((p, 1 << max(depth - 1, 0), 256, 2))  # leaves of the last split depth
    rng = np.random.default_rng(random_state)
    n_sub = max(1, round(subsample * n))
    feats = np.zeros((n_trees, depth), dtype=np.int64)
    thrs = np.zeros((n_trees, depth))
    values = np.zeros((n_trees, 1 << depth))
    weights = np.zeros((n_trees, 1 << depth))
    for t in range(n_trees):  # boosting is sequential; each step is vectorised
        rows = (np.arange(n) if n_sub >= n
                else np.sort(rng.choice(n, size=n_sub, replace=False)))
        prob = expit(F[rows])
        g = w[rows] * (prob - yf[rows])
        h = w[rows] * prob * (1.0 - prob)
        f, tc, G, H = _grow(codes, rows, g, h, n_cand, depth, l2_regularization,
                            min_child_weight, hist, kernels)
        v = -learning_rate * G / (H + l2_regularization) if l2_regularization > 0 else \
            -learning_rate * G / np.where(H > 0, H, 1.0)
        feats[t] = f
        thrs[t] = np.where(tc < 0, np.nan, thr_of[f, np.maximum(tc, 0)])
        values[t] = v
        weights[t] = H
        kernels[2](codes, f, tc, v, F)
    ens = ObliviousEnsemble(baseline, feats, thrs, values, weights, n_features=p)
    ens.validate()
    return ens


# ---------------------------------------------------------------------------- evaluator
class ObliviousForest:
    """Evaluator of one or more :class:`ObliviousEnsemble` of one depth over shared inputs.

    Parameters
    ----------
    ensembles : list of ObliviousEnsemble
        Over the same input columns, with the same depth.
    """

    def __init__(self, ensembles: list[ObliviousEnsemble]) -> None:
        self.ensembles = list(ensembles)
        depths = {e.depth for e in ensembles}
        if len(depths) > 1:
            raise ValueError("ensembles of one forest must have the same depth")
        self.baselines = np.array([e.baseline for e in ensembles], dtype=np.float64)
        feats = [e.features for e in ensembles]
        depth = depths.pop() if depths else 1
        allf = np.concatenate(feats) if feats else np.zeros((0, depth), dtype=np.int64)
        self.columns = np.unique(allf) if allf.size else np.zeros(1, dtype=np.int64)
        self.feats = np.ascontiguousarray(np.searchsorted(self.columns, allf), dtype=np.int64)
        self.thrs = np.ascontiguousarray(np.concatenate(
            [e.thresholds for e in ensembles]) if ensembles else np.zeros((0, depth)))
        self.values = np.ascontiguousarray(np.concatenate(
            [e.leaf_values for e in ensembles]) if ensembles else np.zeros((0, 1 << depth)))
        self.tree_ens = np.repeat(np.arange(len(ensembles)), [e.n_trees for e in ensembles])
        self._build_codes()

    def _build_codes(self) -> None:
        """Arrays of the 8-bit kernel; ``coded`` is False when it cannot take the forest.

        ``table[j, :n_thr[j]]`` are the distinct non-NaN thresholds of column ``j`` in
        increasing order (padded with +inf), ``tcodes`` each split's position among them
        plus one (0 for a NaN threshold), ``groups`` the first tree of each run of up to
        four trees of one ensemble (and the number of trees), ``group_ens`` their ensemble.
        Depths beyond 8 (leaves do not fit a byte) or more than 255 distinct thresholds on
        one column (codes do not fit a byte beside NaN's) leave the forest to the float
        kernel.
        """
        n_cols = self.columns.size
        n_trees, depth = self.feats.shape
        self.table = np.full((n_cols, 256), np.inf)
        self.n_thr = np.zeros(n_cols, dtype=np.int64)
        flat_f, flat_t = self.feats.ravel(), self.thrs.ravel()
        known = ~np.isnan(flat_t)
        rank = np.zeros(flat_t.size, dtype=np.int64)
        self.coded = depth <= 8
        for j in range(n_cols):  # loop over columns, vectorised over their splits
            sel = np.flatnonzero(known & (flat_f == j))
            t = np.unique(flat_t[sel])  # -0.0 and 0.0 are one threshold, as for `<=`
            self.n_thr[j] = t.size
            if t.size > 255:
                self.coded = False
                break
            self.table[j, :t.size] = t
            rank[sel] = np.searchsorted(t, flat_t[sel]) + 1
        self.tcodes = rank.reshape(n_trees, depth).astype(np.uint8)
        starts = []
        for k in range(self.baselines.size):  # loop over ensembles: runs of four trees
            lo, hi = np.searchsorted(self.tree_ens, [k, k + 1])
            starts.append(np.arange(lo, hi, 4))
        self.groups = np.concatenate([*starts, [n_trees]]).astype(np.int64)
        self.group_ens = self.tree_ens[self.groups[:-1]].astype(np.int64)

    def raw(self, X: NDArray[np.float64], *, kernel: str = "auto",
            n_threads: int | None = None) -> NDArray[np.float64]:
        """Log-odds of every ensemble, shape (n_samples, n_ensembles).

        Parameters
        ----------
        X : ndarray of shape (n_samples, n_features)
            Raw features.
        kernel : {"auto", "codes", "block", "rows"}, default="auto"
            Numba kernel: 8-bit codes, float64 values with trees outer, or levels outer;
            "auto" takes "codes" when the forest allows (``coded``), else "block". All
            give the same bits as the numpy evaluator.
        n_threads : int, optional
            Threads, each evaluating whole blocks of levels with the "codes" or "block"
            kernel (default: scikit-learn's OpenMP choice, which follows ``threadpoolctl``
            limits).
        """
        return self.raw_checked(X, kernel=kernel, n_threads=n_threads)[0]

    def raw_checked(
        self, X: NDArray[np.float64], *, kernel: str = "auto", n_threads: int | None = None
    ) -> tuple[NDArray[np.float64], bool]:
        """:meth:`raw` and whether any value of `X` (any column) is infinite.

        The compiled kernels count infinite values while they read the levels, so callers
        that must refuse them need no separate scan of `X`.
        """
        X = np.asarray(X, dtype=np.float64)
        if X.ndim != 2:
            raise ValueError("X must be two-dimensional")
        if not (X.flags.c_contiguous or X.flags.f_contiguous):
            X = np.ascontiguousarray(X)  # kernels are compiled for C and F layouts only
        n = X.shape[0]
        out = np.empty((n, self.baselines.size), dtype=np.float64)
        if kernel == "auto":
            kernel = "codes" if self.coded else "block"
        if kernel == "codes" and not self.coded:
            raise ValueError("this forest cannot be evaluated on 8-bit codes")
        fn = _kernel(f"predict_{kernel}")
        if fn is None or kernel == "rows":
            for start in range(0, n, BLOCK_LEVELS):
                stop = min(start + BLOCK_LEVELS, n)
                if fn is None:
                    self._block_numpy(X, start, stop, out)
                else:
                    fn(X, start, stop, self.columns, self.feats, self.thrs, self.values,
                       self.tree_ens, self.baselines, out)
            return out, bool(np.isinf(X).any())

        def block(start: int) -> int:
            stop = min(start + BLOCK_LEVELS, n)
            if kernel == "codes":
                return int(fn(X, start, stop, self.columns, self.table, self.n_thr,
                              self.feats, self.tcodes, self.values, self.groups,
                              self.group_ens, self.baselines, out))
            return int(fn(X, start, stop, self.columns, self.feats, self.thrs, self.values,
                          self.tree_ens, self.baselines, out))

        n_inf = sum(map_blocks(block, n, BLOCK_LEVELS, effective_threads(n_threads)))
        return out, n_inf > 0

    def _block_numpy(self, X: NDArray[np.float64], start: int, stop: int,
                     out: NDArray[np.float64]) -> None:
        xb = X[start:stop][:, self.columns]
        acc = np.tile(self.baselines, (stop - start, 1))
        for t in range(self.feats.shape[0]):  # loop over trees, vectorised over levels
            leaf = np.zeros(stop - start, dtype=np.int64)
            for d in range(self.feats.shape[1]):
                leaf |= (~(xb[:, self.feats[t, d]] <= self.thrs[t, d])).astype(np.int64) << d
            acc[:, self.tree_ens[t]] += self.values[t, leaf]
        out[start:stop] = acc

    def __getstate__(self) -> dict[str, Any]:
        """Pickle the ensembles only."""
        return {"ensembles": self.ensembles}

    def __setstate__(self, state: dict[str, Any]) -> None:
        """Rebuild the evaluator from the pickled ensembles."""
        self.__init__(state["ensembles"])  # type: ignore[misc]
