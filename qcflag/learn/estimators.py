"""Estimators for ordinal quality grades, with the scikit-learn API.

Labels are ordered grades; by default the four grades of qcflag (1 good < 2 probably good <
3 probably bad < 4 bad), and ``predict_proba`` always has one column per grade in that order,
with zeros for grades that were absent from the training labels. Passing ``classes=None``
uses the sorted distinct training labels instead (any orderable labels); the scikit-learn
estimator checks run that way.

Models
------
:class:`OrdinalLogistic`
    Ordinal logistic regression (all-threshold or immediate-threshold variant of Rennie &
    Srebro 2005, via ``mord``) after median imputation and standard scaling.
:class:`CumulativeBoostedClassifier`
    Frank & Hall (2001) cumulative binary decomposition: one gradient-boosted tree model per
    threshold estimates ``P(y > k)``; the cumulative probabilities are made monotone and
    differenced into class probabilities.
:class:`CumulativeObliviousClassifier`
    The same decomposition over boosted oblivious (symmetric) trees of our own
    (:mod:`qcflag.learn.oblivious`), whose prediction is branch-free.
:class:`NominalLogistic`
    Multinomial logistic regression that ignores the order (baseline).
:class:`AlwaysGood`
    Predicts the best grade everywhere (baseline); probabilities are the training priors.
:class:`RulesOnly`
    Predicts the rule grade found in one feature column (baseline).

Class imbalance
---------------
Bad levels are rare (often well under 1 % of an archive). All learning models take
``class_weight``: ``"balanced"`` weights each level by ``n / (n_classes * n_k)``, ``"sqrt"``
(the default) by the square root of that, and ``None`` not at all. The square root is a
compromise: full balancing pushes many good levels into the suspect grades, while no
weighting lets the rare grades vanish from linear fits. The weights enter as sample weights;
``mord`` 0.7's ``LogisticAT``/``LogisticIT`` accept ``sample_weight`` in ``fit`` and pass it
into their loss, and ``HistGradientBoostingClassifier``/``LogisticRegression`` do natively.
Weighting shifts the predicted probabilities toward the rare grades; they are not calibrated
frequencies.

Decision rule
-------------
The ordinal models predict the *median* of the predicted grade distribution (the smallest
grade whose cumulative probability reaches 0.5), which minimises the expected absolute grade
error; this is also ``mord``'s own rule for the threshold models. The nominal baseline
predicts the most probable grade (its natural rule).

References
----------
Rennie, J. D. M. and Srebro, N. (2005). Loss functions for preference levels: regression
with discrete ordered labels. Proc. IJCAI Multidisciplinary Workshop on Advances in
Preference Handling.

Frank, E. and Hall, M. (2001). A simple approach to ordinal classification. Proc. 12th
European Conference on Machine Learning, LNCS 2167, 145-156.
"""

from __future__ import annotations

import warnings
from typing import TYPE_CHECKING, Any, ClassVar, Literal

import numpy as np
from sklearn.base import BaseEstimator, ClassifierMixin
from sklearn.utils.validation import check_is_fitted, validate_data

from qcflag.learn.oblivious import (
    ObliviousEnsemble,
    ObliviousForest,
    bin_codes,
    bin_edges,
    fit_oblivious,
)
from qcflag.learn.trees import TreeEnsemble, TreeForest, expit

if TYPE_CHECKING:
    from numpy.typing import ArrayLike, NDArray

__all__ = [
    "ESTIMATORS",
    "GRADES",
    "AlwaysGood",
    "CumulativeBoostedClassifier",
    "CumulativeObliviousClassifier",
    "NominalLogistic",
    "OrdinalLogistic",
    "RulesOnly",
    "make_estimator",
]

GRADES: tuple[int, ...] = (1, 2, 3, 4)
"""The ordinal grades every qcflag model predicts, best first."""

ClassWeight = Literal["balanced", "sqrt"] | dict[Any, float] | None


# --------------------------------------------------------------------------- helpers
def _sigmoid(x: NDArray[np.float64]) -> NDArray[np.float64]:
    return expit(np.asarray(x, dtype=np.float64))


def _class_sample_weight(
    y_idx: NDArray[np.int64], mode: ClassWeight, classes: NDArray[Any] | None = None
) -> NDArray[np.float64]:
    """Per-sample weights from encoded labels (see the module docstring)."""
    if mode is None:
        return np.ones(y_idx.size)
    if isinstance(mode, dict):
        assert classes is not None
        w = np.array([float(mode.get(c.item() if hasattr(c, "item") else c, 1.0))
                      for c in classes])
        if (w < 0).any() or not np.isfinite(w).all():
            raise ValueError("class_weight values must be finite and non-negative")
        return w[y_idx]
    if mode not in ("balanced", "sqrt"):
        raise ValueError(
            f"class_weight must be 'balanced', 'sqrt', a dict or None, got {mode!r}")
    counts = np.bincount(y_idx)
    present = counts > 0
    w_class = np.zeros(counts.size)
    w_class[present] = y_idx.size / (present.sum() * counts[present])
    if mode == "sqrt":
        w_class = np.sqrt(w_class)
    return w_class[y_idx]


def _median_index(proba: NDArray[np.float64]) -> NDArray[np.int64]:
    """Column of the median of each row's distribution (first cumulative >= 0.5)."""
    cum = np.cumsum(proba, axis=1)
    idx = (cum < 0.5 - 1e-12).sum(axis=1)
    return np.minimum(idx, proba.shape[1] - 1)


class _GradeEstimator(ClassifierMixin, BaseEstimator):
    """Shared label handling, validation and persistence hooks."""

    _ordinal: ClassVar[bool] = True
    #: names of the fitted ndarray attributes written to a model file
    _array_attrs: ClassVar[tuple[str, ...]] = ()
    #: names of fitted scalar (JSON) attributes written to a model file
    _scalar_attrs: ClassVar[tuple[str, ...]] = ()

    classes: Any

    def __sklearn_tags__(self) -> Any:
        tags = super().__sklearn_tags__()
        tags.input_tags.allow_nan = True
        return tags

    # labels ---------------------------------------------------------------
    def _encode_labels(self, y: NDArray[Any]) -> NDArray[np.int64]:
        """Set ``classes_``/``seen_`` and return label indices into ``classes_``."""
        if self.classes is None:
            classes = np.unique(y)
        else:
            classes = np.asarray(self.classes)
            if classes.ndim != 1 or classes.size < 1:
                raise ValueError("classes must be a non-empty 1-D sequence")
            if (np.diff(classes) <= 0).any():
                raise ValueError("classes must be strictly increasing")
            unknown = ~np.isin(y, classes)
            if unknown.any():
                raise ValueError(
                    f"y holds labels {np.unique(y[unknown]).tolist()[:5]} outside classes "
                    f"{classes.tolist()}"
                )
        self.classes_ = classes
        y_idx = np.searchsorted(classes, y).astype(np.int64)
        self.seen_ = np.isin(np.arange(classes.size), y_idx)
        return y_idx

    def _validate_fit(self, X: ArrayLike, y: ArrayLike) -> tuple[NDArray[np.float64], Any]:
        X, y = validate_data(self, X, y, ensure_all_finite="allow-nan", dtype=np.float64)
        from sklearn.utils.multiclass import check_classification_targets

        check_classification_targets(y)
        return X, y

    def _validate_predict(self, X: ArrayLike, *, finite: bool = True) -> NDArray[np.float64]:
        """Run scikit-learn's checks of a prediction input.

        ``finite=False`` skips the scan for infinite values: the caller then detects them on
        the way and calls this again with ``finite=True`` to raise scikit-learn's error.
        """
        check_is_fitted(self)
        return validate_data(
            self, X, reset=False, ensure_all_finite="allow-nan" if finite else False,
            dtype=np.float64,
        )

    def _pad(self, proba_seen: NDArray[np.float64]) -> NDArray[np.float64]:
        """Place probabilities of the seen classes into all ``classes_`` columns.

        Returns `proba_seen` itself when every class was seen (callers pass a fresh array).
        """
        if self.seen_.all():
            return proba_seen
        out = np.zeros((proba_seen.shape[0], self.classes_.size), dtype=np.float64)
        out[:, self.seen_] = proba_seen
        return out

    def predict(self, X: ArrayLike) -> NDArray[Any]:
        """Predict the grade of every sample.

        Parameters
        ----------
        X : array-like of shape (n_samples, n_features)

        Returns
        -------
        ndarray of shape (n_samples,)
            Values of ``classes_``: the median of the predicted distribution for ordinal
            models, the most probable class otherwise.
        """
        proba = self.predict_proba(X)
        idx = _median_index(proba) if self._ordinal else np.argmax(proba, axis=1)
        return self.classes_[idx]

    def contributions(self, X: ArrayLike) -> NDArray[np.float64]:
        """Cheap per-feature attribution of each sample's 'badness', shape (n, n_features).

        Positive values push toward worse (higher) grades. Linear models: coefficient times
        the standardised value; boosted trees: path attributions summed over thresholds;
        baselines: zeros (:class:`RulesOnly`: the rule grade minus one in its column).
        """
        X = self._validate_predict(X)
        return np.zeros_like(X)

    # persistence ------------------------------------------------------------
    def _export(self) -> tuple[dict[str, Any], dict[str, NDArray[Any]]]:
        """(JSON-able params + scalars, arrays) describing the fitted state."""
        check_is_fitted(self)
        params = dict(self.get_params(deep=False))
        if params.get("classes") is not None:
            params["classes"] = [int(c) for c in params["classes"]]
        scalars = {k: getattr(self, k) for k in self._scalar_attrs}
        arrays = {k: np.asarray(getattr(self, k)) for k in self._array_attrs}
        arrays["classes_"] = np.asarray(self.classes_)
        arrays["seen_"] = np.asarray(self.seen_)
        meta = {"params": params, "fitted": scalars, "fitted_n_features": int(self.n_features_in_)}
        return meta, arrays

    @classmethod
    def _restore(cls, meta: dict[str, Any], arrays: dict[str, NDArray[Any]]) -> Any:
        est = cls(**meta["params"])
        for k, v in meta["fitted"].items():
            setattr(est, k, v)
        for k in (*cls._array_attrs, "classes_", "seen_"):
            setattr(est, k, arrays[k])
        est.n_features_in_ = int(meta["fitted_n_features"])
        return est


def _fit_scaling(
    X: NDArray[np.float64],
) -> tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.float64], list[Any]]:
    """Fit SimpleImputer(median) -> arcsinh -> StandardScaler; statistics and fitted steps.

    Check statistics are heavy-tailed (a gross spike is thousands of times a small one); the
    arcsinh (a signed logarithm for large values, linear near zero) keeps a few extreme
    levels from dominating the linear fits and keeps the optimisation well conditioned.
    """
    from sklearn.impute import SimpleImputer
    from sklearn.preprocessing import FunctionTransformer, StandardScaler

    imp = SimpleImputer(strategy="median", keep_empty_features=True).fit(X)
    ash = FunctionTransformer(np.arcsinh).fit(X)
    sc = StandardScaler().fit(np.arcsinh(imp.transform(X)))
    steps = [("impute", imp), ("arcsinh", ash), ("scale", sc)]
    return (np.asarray(imp.statistics_, dtype=np.float64), sc.mean_.astype(np.float64),
            sc.scale_.astype(np.float64), steps)


def _standardise(
    X: NDArray[np.float64], fill: NDArray[np.float64], mean: NDArray[np.float64],
    scale: NDArray[np.float64],
) -> NDArray[np.float64]:
    Z = np.where(np.isnan(X), fill, X)
    np.arcsinh(Z, out=Z)
    Z -= mean
    Z /= scale
    return Z


_BLOCK_LEVELS = 8192


def _linear_scores(
    X: NDArray[np.float64], fill: NDArray[np.float64], mean: NDArray[np.float64],
    scale: NDArray[np.float64], coef: NDArray[np.float64], *, check_finite: bool = False,
) -> NDArray[np.float64] | None:
    """``_standardise(X, ...) @ coef`` in one cache-blocked pass, shape (n, k) or (n,).

    The centring and scaling are folded into the weights (``coef / scale``) and an offset,
    so each block of levels is imputed and arcsinh-transformed in place and multiplied
    once. Equal to the unfused product up to rounding (about 1e-15 relative).

    With ``check_finite``, returns None as soon as a block's transformed values are not all
    finite, which happens when `X` holds an infinite value (its arcsinh is infinite, so the
    block's sum is not finite; finite values cannot overflow the sum, each being at most
    about 710 in magnitude): prediction then needs no separate scan for infinities.
    """
    # C order whatever the layout of coef, so a reloaded model multiplies identically
    W = np.ascontiguousarray(coef / (scale if coef.ndim == 1 else scale[:, None]))
    offset = -(mean @ W)
    n = X.shape[0]
    out = np.empty((n, *coef.shape[1:]), dtype=np.float64)
    # one buffer for every block (a fresh one per block costs its page faults each time)
    block = max(1, min(_BLOCK_LEVELS, n))
    Zb = np.empty((block, X.shape[1]), dtype=np.float64)
    Mb = np.empty((block, X.shape[1]), dtype=bool)
    fill_b = np.broadcast_to(fill, Zb.shape)
    for start in range(0, n, block):
        m = min(block, n - start)
        Z, M = Zb[:m], Mb[:m]
        np.copyto(Z, X[start:start + m], casting="unsafe")
        np.isnan(Z, out=M)
        np.copyto(Z, fill_b[:m], where=M)
        np.arcsinh(Z, out=Z)
        if check_finite:
            with np.errstate(invalid="ignore"):  # inf - inf in the sum is what we look for
                if not np.isfinite(Z.sum()):
                    return None
        np.matmul(Z, W, out=out[start:start + m])
    out += offset
    return out


def _subsample(
    y_idx: NDArray[np.int64], sw: NDArray[np.float64], max_samples: int | None, seed: int
) -> tuple[NDArray[np.int64], NDArray[np.float64]]:
    """Keep every level of the rarer classes and a random share of the commonest one.

    The kept levels of the commonest class are up-weighted by the inverse of the share, so
    the weighted fit estimates the same model as the full data.
    """
    n = y_idx.size
    if max_samples is None or n <= max_samples:
        return np.arange(n), sw
    counts = np.bincount(y_idx)
    major = int(counts.argmax())
    others = np.flatnonzero(y_idx != major)
    pool = np.flatnonzero(y_idx == major)
    n_keep = min(pool.size, max(max_samples - others.size, max_samples // 10))
    rng = np.random.default_rng(seed)
    pick = rng.choice(pool, size=n_keep, replace=False)
    idx = np.sort(np.concatenate([others, pick]))
    w = sw[idx] * np.where(y_idx[idx] == major, pool.size / n_keep, 1.0)
    return idx, w


# --------------------------------------------------------------------------- baselines
class AlwaysGood(_GradeEstimator):
    """Baseline that calls every level good (the lowest class).

    Parameters
    ----------
    classes : sequence of int or None, default=(1, 2, 3, 4)
        Ordered labels; None uses the sorted distinct training labels.

    Attributes
    ----------
    classes_ : ndarray of shape (n_classes,)
        Ordered labels, the columns of ``predict_proba``.
    seen_ : ndarray of bool, shape (n_classes,)
        Which classes occurred in the training labels.
    prior_ : ndarray of shape (n_classes,)
        Training class frequencies, returned by ``predict_proba`` for every sample.
    n_features_in_ : int
        Number of features seen in ``fit``.
    feature_names_in_ : ndarray of str
        Feature names seen in ``fit`` (only when X had string column names).
    """

    _array_attrs = ("prior_",)

    def __init__(self, *, classes: ArrayLike | None = GRADES) -> None:
        self.classes = classes

    def fit(self, X: ArrayLike, y: ArrayLike, groups: ArrayLike | None = None) -> AlwaysGood:
        """Record the class priors; `groups` is ignored."""
        X, y = self._validate_fit(X, y)
        y_idx = self._encode_labels(y)
        self.prior_ = np.bincount(y_idx, minlength=self.classes_.size) / y_idx.size
        return self

    def predict_proba(self, X: ArrayLike) -> NDArray[np.float64]:
        """Training priors for every sample, shape (n_samples, n_classes)."""
        X = self._validate_predict(X)
        return np.tile(self.prior_, (X.shape[0], 1))

    def predict(self, X: ArrayLike) -> NDArray[Any]:
        """Predict the lowest (best) class for every sample."""
        X = self._validate_predict(X)
        return np.full(X.shape[0], self.classes_[0])


class RulesOnly(_GradeEstimator):
    """Baseline that predicts the rule grade stored in one feature column.

    ``predict`` returns the rule grade itself (snapped to the nearest class);
    ``predict_proba`` returns the training frequency of each class among levels with the same
    rule grade (Laplace-smoothed), so probability-based scores rank levels by their rule grade.

    Parameters
    ----------
    column : int, default=-1
        Index of the feature column holding the rule grade.
    classes : sequence of int or None, default=(1, 2, 3, 4)
        Ordered labels; None uses the sorted distinct training labels.

    Attributes
    ----------
    classes_ : ndarray of shape (n_classes,)
        Ordered labels.
    seen_ : ndarray of bool, shape (n_classes,)
        Which classes occurred in the training labels.
    rule_values_ : ndarray of float64
        Distinct rule grades seen in training.
    table_ : ndarray of shape (n_rule_values + 1, n_classes)
        Class frequencies per rule grade; the last row (overall frequencies) serves rule
        grades not seen in training.
    n_features_in_ : int
        Number of features seen in ``fit``.
    feature_names_in_ : ndarray of str
        Feature names seen in ``fit`` (only when X had string column names).
    """

    _array_attrs = ("rule_values_", "table_")

    def __init__(self, *, column: int = -1, classes: ArrayLike | None = GRADES) -> None:
        self.column = column
        self.classes = classes

    def _rule(self, X: NDArray[np.float64]) -> NDArray[np.float64]:
        if not -X.shape[1] <= self.column < X.shape[1]:
            raise ValueError(f"column {self.column} is outside the {X.shape[1]} features")
        return np.round(X[:, self.column])

    def fit(self, X: ArrayLike, y: ArrayLike, groups: ArrayLike | None = None) -> RulesOnly:
        """Tabulate class frequencies per rule grade; `groups` is ignored."""
        X, y = self._validate_fit(X, y)
        y_idx = self._encode_labels(y)
        r = self._rule(X)
        r = np.where(np.isnan(r), -1.0, r)
        self.rule_values_ = np.unique(r)
        k = self.classes_.size
        rows = np.searchsorted(self.rule_values_, r)
        table = np.zeros((self.rule_values_.size + 1, k))
        np.add.at(table, (rows, y_idx), 1.0)
        table[-1] = table[:-1].sum(axis=0)
        table[:, self.seen_] += 1.0  # Laplace smoothing over the seen classes
        self.table_ = table / table.sum(axis=1, keepdims=True)
        return self

    def predict_proba(self, X: ArrayLike) -> NDArray[np.float64]:
        """Training class frequencies given the rule grade, shape (n_samples, n_classes)."""
        X = self._validate_predict(X)
        r = self._rule(X)
        r = np.where(np.isnan(r), -1.0, r)
        pos = np.clip(np.searchsorted(self.rule_values_, r), 0, self.rule_values_.size - 1)
        known = self.rule_values_[pos] == r
        return self.table_[np.where(known, pos, self.rule_values_.size)]

    def predict(self, X: ArrayLike) -> NDArray[Any]:
        """Predict the rule grade of every sample, snapped to the nearest class."""
        X = self._validate_predict(X)
        r = self._rule(X)
        r = np.where(np.isnan(r), self.classes_[0], r).astype(np.float64)
        cls = self.classes_.astype(np.float64)
        idx = np.abs(r[:, None] - cls[None, :]).argmin(axis=1)
        return self.classes_[idx]

    def contributions(self, X: ArrayLike) -> NDArray[np.float64]:
        """Rule grade minus one in the rule column, zeros elsewhere."""
        X = self._validate_predict(X)
        out = np.zeros_like(X)
        out[:, self.column] = np.nan_to_num(self._rule(X) - 1.0)
        return out


# --------------------------------------------------------------------------- linear
class OrdinalLogistic(_GradeEstimator):
    """Ordinal logistic regression (``mord``) after imputation and scaling.

    The model is ``P(y <= k | x) = sigmoid(theta_k - w . z)`` with ``z`` the median-imputed,
    arcsinh-transformed, standardised features: one weight vector and ordered thresholds,
    so a larger ``w . z`` moves probability toward worse grades.

    Parameters
    ----------
    kind : {"at", "it"}, default="at"
        All-threshold (``mord.LogisticAT``, a surrogate of the absolute error) or
        immediate-threshold (``mord.LogisticIT``, a surrogate of the 0-1 loss) loss.
    alpha : float, default=1.0
        L2 regularisation strength.
    max_iter : int, default=200
        L-BFGS-B iterations (``mord`` runs to a tolerance of 1e-12, so this is the budget).
    max_samples : int or None, default=200_000
        Fit on at most about this many levels: every level of the rarer grades and a random
        share of the commonest grade, up-weighted by the inverse share (``mord``'s optimiser
        is single-threaded numpy; this bounds training time on big archives). None fits on
        all levels.
    class_weight : {"sqrt", "balanced"}, dict or None, default="sqrt"
        Sample weighting against class imbalance (see the module docstring); a dict maps
        labels to weights (missing labels weigh 1).
    classes : sequence of int or None, default=(1, 2, 3, 4)
        Ordered labels; None uses the sorted distinct training labels.

    Attributes
    ----------
    classes_ : ndarray of shape (n_classes,)
        Ordered labels, the columns of ``predict_proba``.
    seen_ : ndarray of bool, shape (n_classes,)
        Which classes occurred in the training labels (others get probability 0).
    pipeline_ : sklearn.pipeline.Pipeline or None
        The fitted SimpleImputer + arcsinh + StandardScaler + mord pipeline (None after
        loading a model file; prediction uses the arrays below, which the pipeline produced).
    fill_ : ndarray of shape (n_features,)
        Imputation value (training median) of each feature.
    mean_, scale_ : ndarray of shape (n_features,)
        Standardisation applied after imputation and arcsinh.
    coef_ : ndarray of shape (n_features,)
        Weights ``w`` on the standardised features.
    theta_ : ndarray of shape (n_seen - 1,)
        Ordered thresholds between consecutive seen classes.
    n_features_in_ : int
        Number of features seen in ``fit``.
    feature_names_in_ : ndarray of str
        Feature names seen in ``fit`` (only when X had string column names).
    """

    _array_attrs = ("fill_", "mean_", "scale_", "coef_", "theta_")

    def __init__(
        self,
        kind: Literal["at", "it"] = "at",
        alpha: float = 1.0,
        *,
        max_iter: int = 200,
        max_samples: int | None = 200_000,
        class_weight: ClassWeight = "sqrt",
        classes: ArrayLike | None = GRADES,
    ) -> None:
        self.kind = kind
        self.alpha = alpha
        self.max_iter = max_iter
        self.max_samples = max_samples
        self.class_weight = class_weight
        self.classes = classes

    def fit(
        self, X: ArrayLike, y: ArrayLike, groups: ArrayLike | None = None
    ) -> OrdinalLogistic:
        """Fit the pipeline; `groups` is accepted for API symmetry and ignored.

        Parameters
        ----------
        X : array-like of shape (n_samples, n_features)
            Features; NaN allowed (imputed with the training median).
        y : array-like of shape (n_samples,)
            Ordered labels.
        groups : array-like, optional
            Ignored.

        Returns
        -------
        self
        """
        import mord
        from sklearn.pipeline import Pipeline

        if self.kind not in ("at", "it"):
            raise ValueError(f"kind must be 'at' or 'it', got {self.kind!r}")
        X, y = self._validate_fit(X, y)
        y_idx = self._encode_labels(y)
        sw = _class_sample_weight(y_idx, self.class_weight, self.classes_)
        seen = np.flatnonzero(self.seen_)
        y_seen = np.searchsorted(seen, y_idx)
        fill, mean, scale, steps = _fit_scaling(X)
        self.fill_, self.mean_, self.scale_ = fill, mean, scale
        if seen.size < 2:
            self.pipeline_ = None
            self.coef_ = np.zeros(X.shape[1])
            self.theta_ = np.zeros(0)
            return self
        model_cls = mord.LogisticAT if self.kind == "at" else mord.LogisticIT
        ordinal = model_cls(alpha=self.alpha, max_iter=self.max_iter)
        pipe = Pipeline([*steps, ("ordinal", ordinal)])
        rows, w = _subsample(y_seen, sw, self.max_samples, 0)
        ordinal.fit(_standardise(X[rows], fill, mean, scale), y_seen[rows], sample_weight=w)
        self.pipeline_ = pipe
        self.coef_ = np.asarray(ordinal.coef_, dtype=np.float64)
        self.theta_ = np.asarray(ordinal.theta_, dtype=np.float64)
        return self

    def predict_proba(self, X: ArrayLike) -> NDArray[np.float64]:
        """Probability of each class, shape (n_samples, n_classes), rows sum to 1."""
        check_is_fitted(self)
        n_seen = int(self.seen_.sum())
        if n_seen < 2:
            X = self._validate_predict(X)
            return self._pad(np.ones((X.shape[0], 1)))
        Xv = self._validate_predict(X, finite=False)  # infinities: found on the way
        eta = _linear_scores(Xv, self.fill_, self.mean_, self.scale_, self.coef_,
                             check_finite=True)
        if eta is None:
            Xv = self._validate_predict(X)  # raises scikit-learn's error for infinite values
            eta = _linear_scores(Xv, self.fill_, self.mean_, self.scale_, self.coef_)
        cum = _sigmoid(self.theta_[None, :] - eta[:, None])  # P(y <= k)
        n, m = cum.shape
        out = np.empty((n, m + 1))  # differences of 0, P(y <= k)..., 1
        out[:, 0] = cum[:, 0]
        np.subtract(cum[:, 1:], cum[:, :-1], out=out[:, 1:m])
        np.subtract(1.0, cum[:, m - 1], out=out[:, m])
        return self._pad(out)

    def contributions(self, X: ArrayLike) -> NDArray[np.float64]:
        """Coefficient times standardised value, shape (n_samples, n_features)."""
        X = self._validate_predict(X)
        return _standardise(X, self.fill_, self.mean_, self.scale_) * self.coef_

    @classmethod
    def _restore(cls, meta: dict[str, Any], arrays: dict[str, NDArray[Any]]) -> Any:
        est = super()._restore(meta, arrays)
        est.pipeline_ = None
        return est


class NominalLogistic(_GradeEstimator):
    """Multinomial logistic regression that ignores the order of the grades (baseline).

    Parameters
    ----------
    C : float, default=1.0
        Inverse L2 regularisation strength.
    max_iter : int, default=300
        lbfgs iterations.
    class_weight : {"sqrt", "balanced"}, dict or None, default="sqrt"
        Sample weighting against class imbalance (see the module docstring); a dict maps
        labels to weights (missing labels weigh 1).
    classes : sequence of int or None, default=(1, 2, 3, 4)
        Ordered labels; None uses the sorted distinct training labels.

    Attributes
    ----------
    classes_ : ndarray of shape (n_classes,)
        Ordered labels.
    seen_ : ndarray of bool, shape (n_classes,)
        Which classes occurred in the training labels.
    pipeline_ : sklearn.pipeline.Pipeline or None
        The fitted imputer + scaler + LogisticRegression (None after loading).
    fill_, mean_, scale_ : ndarray of shape (n_features,)
        Imputation and standardisation (after arcsinh) statistics.
    coef_ : ndarray of shape (n_seen, n_features)
        Weights per seen class (softmax parametrisation).
    intercept_ : ndarray of shape (n_seen,)
        Intercept per seen class.
    n_iter_ : int
        lbfgs iterations run (equal to `max_iter` if it did not converge).
    n_features_in_ : int
        Number of features seen in ``fit``.
    feature_names_in_ : ndarray of str
        Feature names seen in ``fit`` (only when X had string column names).
    """

    _ordinal = False
    _array_attrs = ("fill_", "mean_", "scale_", "coef_", "intercept_")
    _scalar_attrs = ("n_iter_",)

    def __init__(
        self,
        C: float = 1.0,
        *,
        max_iter: int = 300,
        class_weight: ClassWeight = "sqrt",
        classes: ArrayLike | None = GRADES,
    ) -> None:
        self.C = C
        self.max_iter = max_iter
        self.class_weight = class_weight
        self.classes = classes

    def fit(
        self, X: ArrayLike, y: ArrayLike, groups: ArrayLike | None = None
    ) -> NominalLogistic:
        """Fit the pipeline; `groups` is ignored."""
        from sklearn.linear_model import LogisticRegression
        from sklearn.pipeline import Pipeline

        X, y = self._validate_fit(X, y)
        y_idx = self._encode_labels(y)
        sw = _class_sample_weight(y_idx, self.class_weight, self.classes_)
        fill, mean, scale, steps = _fit_scaling(X)
        self.fill_, self.mean_, self.scale_ = fill, mean, scale
        n_seen = int(self.seen_.sum())
        if n_seen < 2:
            self.pipeline_ = None
            self.coef_ = np.zeros((1, X.shape[1]))
            self.intercept_ = np.zeros(1)
            self.n_iter_ = 0
            return self
        from sklearn.exceptions import ConvergenceWarning

        lr = LogisticRegression(C=self.C, max_iter=self.max_iter)
        with warnings.catch_warnings():  # a baseline; n_iter_ tells whether it converged
            warnings.simplefilter("ignore", ConvergenceWarning)
            lr.fit(_standardise(X, fill, mean, scale), y_idx, sample_weight=sw)
        self.pipeline_ = Pipeline([*steps, ("logistic", lr)])
        self.n_iter_ = int(np.max(lr.n_iter_))
        coef = np.asarray(lr.coef_, dtype=np.float64)
        icpt = np.asarray(lr.intercept_, dtype=np.float64)
        if n_seen == 2:  # binary: one row for the second class; softmax-equivalent form
            coef = np.vstack([-coef / 2, coef / 2])
            icpt = np.array([-icpt[0] / 2, icpt[0] / 2])
        self.coef_, self.intercept_ = coef, icpt
        return self

    def predict_proba(self, X: ArrayLike) -> NDArray[np.float64]:
        """Softmax probabilities, shape (n_samples, n_classes)."""
        X = self._validate_predict(X)
        if self.seen_.sum() < 2:
            return self._pad(np.ones((X.shape[0], 1)))
        z = _linear_scores(X, self.fill_, self.mean_, self.scale_, self.coef_.T)
        z += self.intercept_
        z -= z.max(axis=1, keepdims=True)
        np.exp(z, out=z)
        z /= z.sum(axis=1, keepdims=True)
        return self._pad(z)

    def contributions(self, X: ArrayLike) -> NDArray[np.float64]:
        """Standardised value times (worst-seen minus best-seen class weight)."""
        X = self._validate_predict(X)
        w = self.coef_[-1] - self.coef_[0]
        return _standardise(X, self.fill_, self.mean_, self.scale_) * w


# --------------------------------------------------------------------------- boosted
class _CumulativeTrees(_GradeEstimator):
    """Frank & Hall cumulative decomposition shared by the boosted-tree models.

    A subclass fits one binary log-odds model per threshold between consecutive seen
    classes (``_fit_thresholds``) and names the evaluator that scores them all at once
    (``_evaluator``); this class turns the scores into monotone cumulative and class
    probabilities (the rule is in :class:`CumulativeBoostedClassifier`'s docstring), sums
    the attributions and stores the ensembles.
    """

    #: class of the per-threshold ensembles (``to_arrays``/``from_arrays``/``contributions``)
    _ensemble_cls: ClassVar[Any]
    ensembles_: list[Any]

    def _fit_thresholds(
        self, X: NDArray[np.float64], y_idx: NDArray[np.int64], sw: NDArray[np.float64],
        thresholds: NDArray[np.int64],
    ) -> list[Any]:
        """One ensemble per class index in `thresholds`, each estimating ``P(y > k)``."""
        raise NotImplementedError

    @staticmethod
    def _evaluator(ensembles: list[Any]) -> Any:
        """Object whose ``raw(X)`` gives every ensemble's log-odds, shape (n, n_ens)."""
        raise NotImplementedError

    def fit(self, X: ArrayLike, y: ArrayLike, groups: ArrayLike | None = None) -> Any:
        """Fit one boosted model per threshold; `groups` is ignored."""
        X, y = self._validate_fit(X, y)
        y_idx = self._encode_labels(y)
        sw = _class_sample_weight(y_idx, self.class_weight, self.classes_)
        seen = np.flatnonzero(self.seen_)
        self.ensembles_ = self._fit_thresholds(X, y_idx, sw, seen[:-1])
        self._forest = self._evaluator(self.ensembles_) if self.ensembles_ else None
        if seen.size > 1 and not self.ensembles_:  # no usable feature: class priors
            self.seen_ = np.zeros_like(self.seen_)
            self.seen_[int(np.bincount(y_idx).argmax())] = True
        return self

    def cumulative_proba(self, X: ArrayLike) -> NDArray[np.float64]:
        """Monotone ``P(y > k)`` per threshold between seen classes, shape (n, n_seen - 1)."""
        check_is_fitted(self)
        if not self.ensembles_:
            X = self._validate_predict(X)
            return np.zeros((X.shape[0], 0))
        Xv = self._validate_predict(X, finite=False)  # infinities: the kernels count them
        forest = getattr(self, "_forest", None)
        if forest is None:  # ensembles_ set by hand: build the evaluator without caching it
            forest = self._evaluator(self.ensembles_)
        raw, has_inf = forest.raw_checked(Xv)
        if has_inf:
            self._validate_predict(X)  # raises scikit-learn's error for infinite values
        gt = expit(raw)
        for k in range(1, gt.shape[1]):  # running minimum (np.minimum.accumulate along
            np.minimum(gt[:, k - 1], gt[:, k], out=gt[:, k])  # rows is slower)
        return gt

    def predict_proba(self, X: ArrayLike) -> NDArray[np.float64]:
        """Probability of each class, shape (n_samples, n_classes), rows sum to 1."""
        gt = self.cumulative_proba(X)
        n, m = gt.shape
        out = np.empty((n, m + 1))  # P(y > previous) - P(y > this), with 1 and 0 at the ends
        out[:, 0] = 1.0 - (gt[:, 0] if m else 0.0)
        np.subtract(gt[:, :-1], gt[:, 1:], out=out[:, 1:m])
        if m:
            out[:, m] = gt[:, m - 1]
        return self._pad(out)

    def contributions(self, X: ArrayLike) -> NDArray[np.float64]:
        """Path attributions of the log-odds, summed over the thresholds."""
        X = self._validate_predict(X)
        out = np.zeros_like(X)
        for e in self.ensembles_:
            out += e.contributions(X)
        return out

    def _export(self) -> tuple[dict[str, Any], dict[str, NDArray[Any]]]:
        meta, arrays = super()._export()
        metas = []
        for i, e in enumerate(self.ensembles_):
            m, a = e.to_arrays(f"t{i}_")
            metas.append(m)
            arrays.update(a)
        meta["ensembles"] = metas
        return meta, arrays

    @classmethod
    def _restore(cls, meta: dict[str, Any], arrays: dict[str, NDArray[Any]]) -> Any:
        est = super()._restore(meta, arrays)
        est.ensembles_ = [cls._ensemble_cls.from_arrays(m, arrays, f"t{i}_")
                          for i, m in enumerate(meta["ensembles"])]
        if len(est.ensembles_) != max(int(np.sum(est.seen_)) - 1, 0):
            raise ValueError("number of threshold models does not match the seen classes")
        if any(e.n_features != est.n_features_in_ for e in est.ensembles_):
            raise ValueError("threshold models do not match the feature count")
        est._forest = cls._evaluator(est.ensembles_) if est.ensembles_ else None
        return est


class CumulativeBoostedClassifier(_CumulativeTrees):
    """Frank & Hall cumulative decomposition over gradient-boosted trees.

    For each threshold between consecutive seen classes ``k`` one
    :class:`~sklearn.ensemble.HistGradientBoostingClassifier` learns ``P(y > k)``. Separate
    binary models need not agree, so the cumulative probabilities are made non-increasing in
    ``k`` with a running minimum before differencing:
    ``P(y = c_0) = 1 - P(y > c_0)``, ``P(y = c_j) = P(y > c_{j-1}) - P(y > c_j)``,
    ``P(y = c_last) = P(y > c_{last-1})``; every row is then non-negative and sums to 1.

    The fitted trees are kept as plain arrays (:class:`qcflag.learn.trees.TreeEnsemble`), and
    prediction always goes through them, so a model reloaded from a file predicts exactly
    what the freshly fitted one did.

    Parameters
    ----------
    max_iter : int, default=100
        Boosting iterations per threshold.
    learning_rate : float, default=0.1
        Shrinkage.
    max_leaf_nodes : int, default=31
        Leaves per tree.
    min_samples_leaf : int, default=20
        Minimum samples per leaf.
    l2_regularization : float, default=0.0
        L2 penalty on leaf values.
    class_weight : {"sqrt", "balanced"}, dict or None, default="sqrt"
        Sample weighting against class imbalance, from the multi-class labels; a dict maps
        labels to weights (missing labels weigh 1).
    random_state : int or None, default=0
        Seed of the boosting models.
    classes : sequence of int or None, default=(1, 2, 3, 4)
        Ordered labels; None uses the sorted distinct training labels.

    Attributes
    ----------
    classes_ : ndarray of shape (n_classes,)
        Ordered labels.
    seen_ : ndarray of bool, shape (n_classes,)
        Which classes occurred in the training labels.
    ensembles_ : list of TreeEnsemble
        One per threshold, ``P(y > k)`` for the ``k``-th seen class.
    n_iter_ : ndarray of int
        Boosting iterations of each threshold model.
    n_features_in_ : int
        Number of features seen in ``fit``.
    feature_names_in_ : ndarray of str
        Feature names seen in ``fit`` (only when X had string column names).
    """

    _array_attrs = ("n_iter_",)
    _ensemble_cls = TreeEnsemble

    def __init__(
        self,
        *,
        max_iter: int = 100,
        learning_rate: float = 0.1,
        max_leaf_nodes: int = 31,
        min_samples_leaf: int = 20,
        l2_regularization: float = 0.0,
        class_weight: ClassWeight = "sqrt",
        random_state: int | None = 0,
        classes: ArrayLike | None = GRADES,
    ) -> None:
        self.max_iter = max_iter
        self.learning_rate = learning_rate
        self.max_leaf_nodes = max_leaf_nodes
        self.min_samples_leaf = min_samples_leaf
        self.l2_regularization = l2_regularization
        self.class_weight = class_weight
        self.random_state = random_state
        self.classes = classes

    @staticmethod
    def _evaluator(ensembles: list[Any]) -> TreeForest:
        return TreeForest(ensembles)

    def _fit_thresholds(
        self, X: NDArray[np.float64], y_idx: NDArray[np.int64], sw: NDArray[np.float64],
        thresholds: NDArray[np.int64],
    ) -> list[Any]:
        from sklearn.ensemble import HistGradientBoostingClassifier

        # all-NaN columns carry nothing and trip HGB's binning; fit on the others
        usable = np.flatnonzero(~np.isnan(X).all(axis=0))
        Xu = X[:, usable] if usable.size < X.shape[1] else X
        ensembles = []
        n_iter = []
        for k in thresholds if usable.size else []:
            hgb = HistGradientBoostingClassifier(
                max_iter=self.max_iter,
                learning_rate=self.learning_rate,
                max_leaf_nodes=self.max_leaf_nodes,
                min_samples_leaf=self.min_samples_leaf,
                l2_regularization=self.l2_regularization,
                early_stopping=False,
                random_state=self.random_state,
            )
            hgb.fit(Xu, (y_idx > k).astype(np.int64), sample_weight=sw)
            n_iter.append(hgb.n_iter_)
            ensembles.append(
                TreeEnsemble.from_sklearn(hgb, feature_map=usable, n_features=X.shape[1]))
        self.n_iter_ = np.array(n_iter or [0], dtype=np.int64)
        return ensembles


class CumulativeObliviousClassifier(_CumulativeTrees):
    """Frank & Hall cumulative decomposition over boosted oblivious trees.

    The same cumulative model as :class:`CumulativeBoostedClassifier` (one binary model of
    ``P(y > k)`` per threshold, running minimum, differencing), but each threshold model is
    an ensemble of oblivious trees fitted by :func:`qcflag.learn.oblivious.fit_oblivious`:
    every depth of a tree tests one (feature, threshold), so prediction is a fixed number of
    comparisons per tree and vectorises over levels. The features are binned once (8-bit
    codes, quantile edges) and shared by the threshold models; NaN goes to the greater side.

    Parameters
    ----------
    n_trees : int, default=200
        Trees per threshold.
    depth : int, default=6
        Depth of every tree (``2 ** depth`` leaves).
    learning_rate : float, default=0.1
        Shrinkage.
    l2_regularization : float, default=1.0
        L2 penalty on leaf values (the ``lambda`` of ``-G / (H + lambda)``).
    min_child_weight : float, default=1.0
        Hessian each side of a split keeps at least, summed over the leaves.
    subsample : float, default=1.0
        Share of the levels each tree is grown on (seeded by `random_state`).
    max_bins : int, default=255
        Bins of finite values per feature (at most 255).
    class_weight : {"sqrt", "balanced"}, dict or None, default="sqrt"
        Sample weighting against class imbalance, from the multi-class labels; a dict maps
        labels to weights (missing labels weigh 1).
    random_state : int or None, default=0
        Seed of the bin-edge sample and the row subsamples.
    classes : sequence of int or None, default=(1, 2, 3, 4)
        Ordered labels; None uses the sorted distinct training labels.

    Attributes
    ----------
    classes_ : ndarray of shape (n_classes,)
        Ordered labels.
    seen_ : ndarray of bool, shape (n_classes,)
        Which classes occurred in the training labels.
    ensembles_ : list of ObliviousEnsemble
        One per threshold, ``P(y > k)`` for the ``k``-th seen class.
    n_features_in_ : int
        Number of features seen in ``fit``.
    feature_names_in_ : ndarray of str
        Feature names seen in ``fit`` (only when X had string column names).
    """

    _ensemble_cls = ObliviousEnsemble

    def __init__(
        self,
        *,
        n_trees: int = 200,
        depth: int = 6,
        learning_rate: float = 0.1,
        l2_regularization: float = 1.0,
        min_child_weight: float = 1.0,
        subsample: float = 1.0,
        max_bins: int = 255,
        class_weight: ClassWeight = "sqrt",
        random_state: int | None = 0,
        classes: ArrayLike | None = GRADES,
    ) -> None:
        self.n_trees = n_trees
        self.depth = depth
        self.learning_rate = learning_rate
        self.l2_regularization = l2_regularization
        self.min_child_weight = min_child_weight
        self.subsample = subsample
        self.max_bins = max_bins
        self.class_weight = class_weight
        self.random_state = random_state
        self.classes = classes

    @staticmethod
    def _evaluator(ensembles: list[Any]) -> ObliviousForest:
        return ObliviousForest(ensembles)

    def _fit_thresholds(
        self, X: NDArray[np.float64], y_idx: NDArray[np.int64], sw: NDArray[np.float64],
        thresholds: NDArray[np.int64],
    ) -> list[Any]:
        if thresholds.size == 0:
            return []
        seed = 0 if self.random_state is None else int(self.random_state)
        edges = bin_edges(X, max_bins=self.max_bins, seed=seed)
        codes = bin_codes(X, edges)
        return [
            fit_oblivious(
                codes, edges, y_idx > k, sw, n_trees=self.n_trees, depth=self.depth,
                learning_rate=self.learning_rate, l2_regularization=self.l2_regularization,
                min_child_weight=self.min_child_weight, subsample=self.subsample,
                random_state=None if self.random_state is None
                else [int(self.random_state), int(k)],
            )
            for k in thresholds
        ]


ESTIMATORS: dict[str, type[_GradeEstimator]] = {
    "AlwaysGood": AlwaysGood,
    "RulesOnly": RulesOnly,
    "OrdinalLogistic": OrdinalLogistic,
    "NominalLogistic": NominalLogistic,
    "CumulativeBoostedClassifier": CumulativeBoostedClassifier,
    "CumulativeObliviousClassifier": CumulativeObliviousClassifier,
}
"""The estimator classes a model file may name (nothing else is ever instantiated)."""


def make_estimator(name: str, *, seed: int = 0, rule_column: int = -1) -> _GradeEstimator:
    """Build an estimator from its command-line name.

    Parameters
    ----------
    name : {"boosted", "boosted-oblivious", "logistic-at", "logistic-it", "nominal", ...}
        Which model (also ``"rules"`` and ``"always-good"``).
    seed : int, default=0
        Random state of the boosted models.
    rule_column : int, default=-1
        Feature column holding the rule grade (for ``"rules"``).

    Returns
    -------
    estimator
        Unfitted, with ``classes=(1, 2, 3, 4)``.
    """
    if name == "boosted":
        return CumulativeBoostedClassifier(random_state=seed)
    if name == "boosted-oblivious":
        return CumulativeObliviousClassifier(random_state=seed)
    if name == "logistic-at":
        return OrdinalLogistic("at")
    if name == "logistic-it":
        return OrdinalLogistic("it")
    if name == "nominal":
        return NominalLogistic()
    if name == "rules":
        return RulesOnly(column=rule_column)
    if name == "always-good":
        return AlwaysGood()
    raise ValueError(
        f"unknown estimator {name!r}; choose boosted, boosted-oblivious, logistic-at, "
        "logistic-it or nominal"
    )
