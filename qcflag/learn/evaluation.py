"""Grouped cross-validation of grade models and the side-by-side report.

Levels of one cruise share an instrument, an operator and a flagging session, so they are
never split between training and validation: folds are built from whole groups (cruises),
with :class:`~sklearn.model_selection.StratifiedGroupKFold` when every grade present has at
least as many levels as there are folds, else :class:`~sklearn.model_selection.GroupKFold`.
An optional set of held-out groups is kept out of cross-validation altogether; each model is
then refitted on all other groups and scored on it once.
"""

from __future__ import annotations

import json
import warnings
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd
from sklearn.base import clone

from qcflag.exceptions import QCFlagError
from qcflag.learn.metrics import score_grades

if TYPE_CHECKING:
    from collections.abc import Iterable, Mapping

    from numpy.typing import ArrayLike, NDArray

__all__ = [
    "SUMMARY_METRICS",
    "CVReport",
    "fit_subsampled",
    "grouped_cross_validate",
    "majority_subsample",
    "make_folds",
]

SUMMARY_METRICS: tuple[str, ...] = (
    "mae", "qwk", "roc_auc", "pr_auc", "recall_at_far", "recall_bad", "false_alarm_rate",
    "f1_1", "f1_2", "f1_3", "f1_4",
)
"""Metrics shown in :meth:`CVReport.table` (every metric is kept in :meth:`CVReport.to_dict`)."""

_LOWER_IS_BETTER = {"mae", "false_alarm_rate"}


def make_folds(
    y: NDArray[Any], groups: NDArray[Any], folds: int, seed: int
) -> tuple[list[tuple[NDArray[np.int64], NDArray[np.int64]]], str]:
    """Split sample indices into (train, validation) pairs by whole groups.

    Returns
    -------
    splits : list of (train_idx, val_idx)
    method : str
        ``"StratifiedGroupKFold"`` or ``"GroupKFold"``.

    Raises
    ------
    QCFlagError
        With fewer than two groups.
    """
    from sklearn.model_selection import GroupKFold, StratifiedGroupKFold

    n_groups = np.unique(groups).size
    if n_groups < 2:
        raise QCFlagError(
            f"cross-validation needs at least 2 cruises, found {n_groups}; add flagged "
            "files from more cruises"
        )
    k = min(folds, n_groups)
    if k < 2:
        raise QCFlagError(f"folds must be at least 2, got {folds}")
    counts = np.unique(y, return_counts=True)[1]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", UserWarning)
        if counts.min() >= k:
            splitter: Any = StratifiedGroupKFold(n_splits=k, shuffle=True, random_state=seed)
            method = "StratifiedGroupKFold"
        else:
            splitter = GroupKFold(n_splits=k)
            method = "GroupKFold"
        splits = [(np.asarray(a), np.asarray(b)) for a, b in splitter.split(
            np.zeros((y.size, 1)), y, groups)]
    return splits, method


def majority_subsample(
    y: ArrayLike, max_levels: int | None, *, seed: int = 0, class_weight: Any = "sqrt",
) -> tuple[NDArray[np.int64], dict[int, float] | Any]:
    """Rows to fit on (every level of the rarer grades, a sample of the commonest one).

    The kept levels of the commonest grade are up-weighted by the inverse of the kept share,
    folded into a per-grade weight dict, so an estimator fitted on the rows with that
    ``class_weight`` estimates the same model as one fitted on all rows with `class_weight`
    (in expectation). Gradient boosting bins every feature with weighted percentiles, whose
    cost grows with the number of rows; this is what keeps training cheap.

    Parameters
    ----------
    y : array-like of int
        Grades of the training rows.
    max_levels : int or None
        Rows to keep at most (None or a larger value keeps all; at least as many of the
        commonest grade as of the others are kept).
    seed : int, default=0
        Seed of the sample.
    class_weight : {"sqrt", "balanced"}, dict or None, default="sqrt"
        The estimator's weighting, computed on the full counts.

    Returns
    -------
    rows : ndarray of int64
        Sorted row indices.
    class_weight : dict of int to float, or the input unchanged when nothing was dropped
    """
    y = np.asarray(y)
    n = y.size
    if max_levels is None or n <= max_levels:
        return np.arange(n, dtype=np.int64), class_weight
    cls, counts = np.unique(y, return_counts=True)
    if isinstance(class_weight, dict):
        w = np.array([float(class_weight.get(int(c), 1.0)) for c in cls])
    elif class_weight in ("sqrt", "balanced"):
        w = n / (cls.size * counts.astype(np.float64))
        if class_weight == "sqrt":
            w = np.sqrt(w)
    else:
        w = np.ones(cls.size)
    j = int(np.argmax(counts))
    n_other = n - int(counts[j])
    n_keep = int(min(counts[j], max(max_levels - n_other, n_other, max_levels // 10, 1)))
    pool = np.flatnonzero(y == cls[j])
    rng = np.random.default_rng(seed)
    pick = rng.choice(pool, size=n_keep, replace=False)
    rows = np.sort(np.concatenate([np.flatnonzero(y != cls[j]), pick])).astype(np.int64)
    w[j] *= counts[j] / n_keep
    return rows, {int(c): float(v) for c, v in zip(cls, w, strict=True)}


def fit_subsampled(est: Any, X: NDArray[np.float64], y: NDArray[np.int64], groups: Any,
                   max_levels: int | None, seed: int = 0) -> Any:
    """Clone and fit `est`, on a weighted majority subsample when it takes ``class_weight``.

    Estimators without a ``class_weight`` parameter (the frequency-table baselines) are
    fitted on all rows.
    """
    model = clone(est)
    params = model.get_params()
    if max_levels is None or "class_weight" not in params or y.size <= max_levels:
        return model.fit(X, y, groups=groups)
    rows, cw = majority_subsample(y, max_levels, seed=seed, class_weight=params["class_weight"])
    model.set_params(class_weight=cw)
    g = None if groups is None else np.asarray(groups)[rows]
    return model.fit(X[rows], y[rows], groups=g)


def _summarise(scores: list[dict[str, Any]]) -> dict[str, dict[str, float]]:
    out: dict[str, dict[str, float]] = {}
    for key in scores[0]:
        if key == "confusion":
            continue
        vals = np.array([s[key] for s in scores], dtype=np.float64)
        finite = vals[np.isfinite(vals)]
        mean = float(finite.mean()) if finite.size else float("nan")
        sd = float(finite.std(ddof=1)) if finite.size > 1 else float("nan")
        out[key] = {"mean": mean, "sd": sd}
    return out


def _jsonable(x: Any) -> Any:
    if isinstance(x, dict):
        return {str(k): _jsonable(v) for k, v in x.items()}
    if isinstance(x, (list, tuple)):
        return [_jsonable(v) for v in x]
    if isinstance(x, (np.integer,)):
        return int(x)
    if isinstance(x, (float, np.floating)):
        return None if not np.isfinite(x) else float(x)
    return x


@dataclass
class CVReport:
    """Cross-validation scores of several models on one or more variables.

    Parameters
    ----------
    folds : dict
        ``variable -> model -> list of per-fold score dicts``
        (see :func:`qcflag.learn.metrics.score_grades`).
    holdout : dict
        ``variable -> model -> score dict`` on the held-out groups (empty without a hold-out).
    info : dict
        ``variable -> {"method", "n_folds", "n_groups", "n_levels", "holdout_groups",
        "fold_groups"}``.
    oof : dict
        ``variable -> model -> ndarray (n_levels, 4)`` out-of-fold probabilities of the
        models asked for (NaN rows for held-out levels); not part of :meth:`to_dict`.
    """

    folds: dict[str, dict[str, list[dict[str, Any]]]] = field(default_factory=dict)
    holdout: dict[str, dict[str, dict[str, Any]]] = field(default_factory=dict)
    info: dict[str, dict[str, Any]] = field(default_factory=dict)
    oof: dict[str, dict[str, NDArray[np.float64]]] = field(default_factory=dict)

    @property
    def variables(self) -> list[str]:
        """Variables scored."""
        return list(self.folds)

    def models(self, variable: str) -> list[str]:
        """Models scored for `variable`, in the order given."""
        return list(self.folds[variable])

    def summary(self) -> dict[str, dict[str, dict[str, dict[str, float]]]]:
        """``variable -> model -> metric -> {"mean", "sd"}`` over folds."""
        return {
            v: {m: _summarise(s) for m, s in per.items() if s} for v, per in self.folds.items()
        }

    @classmethod
    def merge(cls, reports: Mapping[str, CVReport]) -> CVReport:
        """Combine single-variable reports under new variable names."""
        out = cls()
        for name, rep in reports.items():
            for v in rep.variables:
                key = name if len(rep.variables) == 1 else f"{name}.{v}"
                out.folds[key] = rep.folds[v]
                out.holdout[key] = rep.holdout.get(v, {})
                out.info[key] = rep.info.get(v, {})
                out.oof[key] = rep.oof.get(v, {})
        return out

    def table(self, metrics: Iterable[str] = SUMMARY_METRICS, *, text: bool = False
              ) -> pd.DataFrame:
        """Models side by side: one row per (variable, model), one column per metric.

        Parameters
        ----------
        metrics : iterable of str
            Which metrics; defaults to :data:`SUMMARY_METRICS`.
        text : bool, default=False
            Cells as ``"mean ± sd"`` strings (plus the held-out score in brackets where there
            is one) instead of numbers; numeric tables have ``<metric>`` and
            ``<metric>_sd`` (and ``<metric>_holdout``) columns.

        Returns
        -------
        pandas.DataFrame
        """
        metrics = list(metrics)
        rows = []
        index = []
        summ = self.summary()
        for v, per in summ.items():
            for m, s in per.items():
                hold = self.holdout.get(v, {}).get(m)
                row: dict[str, Any] = {}
                for k in metrics:
                    mean, sd = s[k]["mean"], s[k]["sd"]
                    if text:
                        cell = "nan" if not np.isfinite(mean) else f"{mean:.3f} ± {sd:.3f}"
                        if hold is not None:
                            hv = hold[k]
                            cell += f" [{hv:.3f}]" if np.isfinite(hv) else " [nan]"
                        row[k] = cell
                    else:
                        row[k] = mean
                        row[f"{k}_sd"] = sd
                        if hold is not None:
                            row[f"{k}_holdout"] = hold[k]
                rows.append(row)
                index.append((v, m))
        idx = pd.MultiIndex.from_tuples(index, names=["variable", "model"])
        return pd.DataFrame(rows, index=idx)

    def to_text(self, metrics: Iterable[str] = SUMMARY_METRICS) -> str:
        """Plain-text table for the command line, one block per variable."""
        metrics = list(metrics)
        tab = self.table(metrics, text=True)
        blocks = []
        for v in self.variables:
            info = self.info.get(v, {})
            head = (
                f"{v}: {info.get('n_folds', '?')}-fold {info.get('method', '')} over "
                f"{info.get('n_groups', '?')} cruises, {info.get('n_levels', '?')} levels"
            )
            if info.get("holdout_groups"):
                head += f"; [held-out: {len(info['holdout_groups'])} cruises]"
            sub = tab.xs(v, level="variable")
            widths = {k: max(len(k), *(len(str(c)) for c in sub[k])) for k in metrics}
            mw = max(len("model"), *(len(m) for m in sub.index))
            lines = [head, "  ".join(["model".ljust(mw), *(k.rjust(widths[k]) for k in metrics)])]
            for m, row in sub.iterrows():
                lines.append("  ".join([str(m).ljust(mw),
                                        *(str(row[k]).rjust(widths[k]) for k in metrics)]))
            blocks.append("\n".join(lines))
        better = ", ".join(sorted(_LOWER_IS_BETTER))
        note = f"(mean ± sd over folds; lower is better for {better}, higher for the rest)"
        return "\n\n".join([*blocks, note])

    def to_dict(self) -> dict[str, Any]:
        """JSON-able content: per-fold scores, summaries, hold-out scores and fold info."""
        return _jsonable(
            {"summary": self.summary(), "folds": self.folds, "holdout": self.holdout,
             "info": self.info}
        )

    def to_json(self) -> str:
        """:meth:`to_dict` as a JSON string."""
        return json.dumps(self.to_dict(), indent=1, allow_nan=False)


def grouped_cross_validate(
    estimators: Mapping[str, Any],
    X: ArrayLike,
    y: ArrayLike,
    groups: ArrayLike,
    *,
    folds: int = 5,
    seed: int = 0,
    holdout: Iterable[Any] | None = None,
    false_alarm: float = 0.01,
    variable: str = "grade",
    oof_models: Iterable[str] = (),
    max_train_levels: int | None = None,
) -> CVReport:
    """Cross-validate grade models by whole groups and score them side by side.

    Parameters
    ----------
    estimators : mapping of str to estimator
        Unfitted estimators (cloned for every fold) with ``predict_proba`` over grades 1-4.
    X : array-like of shape (n_levels, n_features)
        Features.
    y : array-like of int, shape (n_levels,)
        True grades 1-4.
    groups : array-like of shape (n_levels,)
        Group (cruise) of each level; a group is never split between train and validation.
    folds : int, default=5
        Number of folds (reduced to the number of groups if fewer).
    seed : int, default=0
        Shuffling seed of the stratified splitter.
    holdout : iterable of group labels, optional
        Groups kept out of cross-validation and scored once by models refitted on all the
        other groups.
    false_alarm : float, default=0.01
        False-alarm rate of ``recall_at_far``.
    variable : str, default="grade"
        Name of the variable in the report.
    oof_models : iterable of str, default=()
        Models whose out-of-fold probabilities are kept in ``report.oof``.
    max_train_levels : int, optional
        Fit estimators that take ``class_weight`` on at most this many training rows per
        fold (:func:`majority_subsample`); validation always scores every level.

    Returns
    -------
    CVReport

    Raises
    ------
    QCFlagError
        With fewer than two groups outside the hold-out.
    """
    X = np.asarray(X, dtype=np.float64)
    y = np.asarray(y, dtype=np.int64)
    groups = np.asarray(groups)
    if not (X.shape[0] == y.size == groups.size):
        raise ValueError("X, y and groups must have the same number of rows")
    held = np.zeros(y.size, dtype=bool)
    hold_groups: list[Any] = []
    if holdout is not None:
        hold_groups = list(dict.fromkeys(holdout))
        held = np.isin(groups, np.asarray(hold_groups, dtype=groups.dtype))
        if not held.any():
            raise QCFlagError(f"none of the held-out cruises {hold_groups[:5]} is in the data")
    cv_idx = np.flatnonzero(~held)
    splits, method = make_folds(y[cv_idx], groups[cv_idx], folds, seed)
    report = CVReport()
    report.folds[variable] = {name: [] for name in estimators}
    keep_oof = [m for m in oof_models if m in estimators]
    report.oof[variable] = {m: np.full((y.size, 4), np.nan) for m in keep_oof}
    fold_groups = []
    for tr, va in splits:
        tr_i, va_i = cv_idx[tr], cv_idx[va]
        fold_groups.append([_jsonable(g) for g in np.unique(groups[va_i]).tolist()])
        for name, est in estimators.items():
            model = fit_subsampled(est, X[tr_i], y[tr_i], groups[tr_i], max_train_levels,
                                   seed)
            proba = model.predict_proba(X[va_i])
            pred = model.predict(X[va_i])
            if name in report.oof[variable]:
                report.oof[variable][name][va_i] = proba
            report.folds[variable][name].append(
                score_grades(y[va_i], proba, pred, false_alarm=false_alarm))
    report.holdout[variable] = {}
    if held.any():
        for name, est in estimators.items():
            model = fit_subsampled(est, X[cv_idx], y[cv_idx], groups[cv_idx],
                                   max_train_levels, seed)
            report.holdout[variable][name] = score_grades(
                y[held], model.predict_proba(X[held]), model.predict(X[held]),
                false_alarm=false_alarm)
    report.info[variable] = {
        "method": method,
        "n_folds": len(splits),
        "n_groups": int(np.unique(groups[cv_idx]).size),
        "n_levels": int(cv_idx.size),
        "holdout_groups": [_jsonable(g) for g in hold_groups],
        "fold_groups": fold_groups,
        "false_alarm": false_alarm,
    }
    return report
