"""Fitted gradient-boosted trees held as plain arrays.

A :class:`TreeEnsemble` is the part of a fitted binary
:class:`~sklearn.ensemble.HistGradientBoostingClassifier` that prediction needs: a baseline
log-odds and, for every tree, its nodes (split feature, numeric threshold, where missing values
go, children, leaf value). It holds only numeric arrays, so it can be written to a model file
and read back without pickle (see :mod:`qcflag.learn.store`).

Prediction rebuilds scikit-learn's compiled tree predictors from the arrays when they are
available (fast, multi-threaded) and otherwise falls back to :meth:`TreeEnsemble.raw_numpy`,
a vectorised evaluator of our own that walks all samples one tree depth at a time. Both give
the same raw scores; the tests check that, and that both equal the fitted classifier's own
``decision_function``.

Only numeric (non-categorical) splits are supported; qcflag's features are all numeric.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

import numpy as np

if TYPE_CHECKING:
    from numpy.typing import NDArray
    from sklearn.ensemble import HistGradientBoostingClassifier

__all__ = ["NODE_FIELDS", "TreeEnsemble", "expit"]

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
    """Logistic function ``1 / (1 + exp(-x))``, computed without overflow."""
    out = np.empty_like(x, dtype=np.float64)
    pos = x >= 0
    out[pos] = 1.0 / (1.0 + np.exp(-x[pos]))
    e = np.exp(x[~pos])
    out[~pos] = e / (1.0 + e)
    return out


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
    _predictors: list[Any] | None = field(default=None, repr=False, compare=False)

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
    def _sklearn_predictors(self) -> list[Any] | None:
        if self._predictors is not None:
            return self._predictors
        try:
            from sklearn.ensemble._hist_gradient_boosting.common import (
                PREDICTOR_RECORD_DTYPE,
            )
            from sklearn.ensemble._hist_gradient_boosting.predictor import TreePredictor
        except ImportError:  # pragma: no cover - private API moved
            return None
        preds = []
        empty = np.zeros((0, 8), dtype=np.uint32)
        for t in range(self.n_trees):
            sl = slice(int(self.tree_offsets[t]), int(self.tree_offsets[t + 1]))
            rec = np.zeros(sl.stop - sl.start, dtype=PREDICTOR_RECORD_DTYPE)
            rec["value"] = self.nodes["value"][sl]
            rec["count"] = self.nodes["count"][sl]
            rec["feature_idx"] = self.nodes["feature"][sl]
            rec["num_threshold"] = self.nodes["threshold"][sl]
            rec["missing_go_to_left"] = self.nodes["missing_left"][sl]
            rec["left"] = self.nodes["left"][sl]
            rec["right"] = self.nodes["right"][sl]
            rec["is_leaf"] = self.nodes["is_leaf"][sl]
            rec["bin_threshold"] = self.nodes["bin_threshold"][sl]
            preds.append(TreePredictor(rec, empty, empty))
        self._predictors = preds
        return preds

    def raw(self, X: NDArray[np.float64], *, n_threads: int | None = None) -> NDArray[np.float64]:
        """Log-odds of the positive class, shape (n_samples,)."""
        X = np.ascontiguousarray(X, dtype=np.float64)
        preds = self._sklearn_predictors()
        if preds is None:  # pragma: no cover - exercised through raw_numpy in tests
            return self.raw_numpy(X)
        from sklearn.utils._openmp_helpers import _openmp_effective_n_threads

        nt = _openmp_effective_n_threads(n_threads)
        out = np.full(X.shape[0], self.baseline, dtype=np.float64)
        known = np.zeros((0, 8), dtype=np.uint32)
        fmap = np.zeros(self.n_features, dtype=np.uint32)
        for p in preds:
            out += p.predict(X, known, fmap, nt)
        return out

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
