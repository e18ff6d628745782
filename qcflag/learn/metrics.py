"""Scores for graded flags, vectorised with numpy.

Grades are ordered 1 good < 2 probably good < 3 probably bad < 4 bad. "Flagged" means
grade >= 3 (probably bad or bad), the split that decides whether a value is used. Every
function is checked against scikit-learn's own implementation in ``tests/test_learn_metrics.py``.

Definitions
-----------
confusion
    ``C[i, j]`` = number of levels with true grade ``i + 1`` and predicted grade ``j + 1``.
precision, recall, F1 per grade
    As ``sklearn.metrics.precision_recall_fscore_support`` with ``zero_division=0``.
mean absolute grade error (MAE)
    Mean of ``|true - predicted|`` in grade steps.
quadratic weighted kappa (QWK)
    Cohen's kappa with weights ``(i - j)^2`` over the four grades (Cohen 1968), as
    ``sklearn.metrics.cohen_kappa_score(weights="quadratic")``.
ROC AUC, PR AUC
    For flagged (true grade >= 3) versus the rest, scored by ``P(3) + P(4)``: the area under
    the ROC curve (ties counted half) and the average precision (step-wise area under the
    precision-recall curve, as ``sklearn.metrics.average_precision_score``).
recall at a false-alarm rate
    The highest share of flagged levels caught by a score threshold whose share of wrongly
    flagged good levels does not exceed the given rate (read off the full ROC curve).
recall_bad, false_alarm_rate
    Of the predicted grades: share of truly flagged levels predicted >= 3, and share of truly
    unflagged levels predicted >= 3.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np

if TYPE_CHECKING:
    from numpy.typing import ArrayLike, NDArray

__all__ = [
    "average_precision",
    "confusion",
    "flag_rates",
    "mean_absolute_grade_error",
    "per_grade_prf",
    "quadratic_weighted_kappa",
    "recall_at_false_alarm",
    "roc_auc",
    "score_grades",
]

N_GRADES = 4


def confusion(y_true: ArrayLike, y_pred: ArrayLike, n: int = N_GRADES) -> NDArray[np.int64]:
    """Confusion matrix over grades ``1..n``, shape (n, n); rows true, columns predicted."""
    t = np.asarray(y_true, dtype=np.int64) - 1
    p = np.asarray(y_pred, dtype=np.int64) - 1
    if t.size and (t.min() < 0 or t.max() >= n or p.min() < 0 or p.max() >= n):
        raise ValueError(f"grades must lie in 1..{n}")
    return np.bincount(t * n + p, minlength=n * n).reshape(n, n)


def per_grade_prf(cm: NDArray[np.int64]) -> dict[str, NDArray[np.float64]]:
    """Precision, recall, F1 and support per grade from a confusion matrix (0 where undefined)."""
    cm = np.asarray(cm, dtype=np.float64)
    tp = np.diag(cm)
    pred = cm.sum(axis=0)
    true = cm.sum(axis=1)
    precision = np.divide(tp, pred, out=np.zeros_like(tp), where=pred > 0)
    recall = np.divide(tp, true, out=np.zeros_like(tp), where=true > 0)
    denom = precision + recall
    f1 = np.divide(2 * precision * recall, denom, out=np.zeros_like(tp), where=denom > 0)
    return {"precision": precision, "recall": recall, "f1": f1, "support": true}


def mean_absolute_grade_error(y_true: ArrayLike, y_pred: ArrayLike) -> float:
    """Mean absolute difference in grade steps."""
    t = np.asarray(y_true, dtype=np.float64)
    return float(np.mean(np.abs(t - np.asarray(y_pred, dtype=np.float64)))) if t.size else np.nan


def quadratic_weighted_kappa(cm: NDArray[np.int64]) -> float:
    """Cohen's quadratic weighted kappa from a confusion matrix (NaN when undefined)."""
    cm = np.asarray(cm, dtype=np.float64)
    n = cm.shape[0]
    total = cm.sum()
    if total == 0:
        return np.nan
    i = np.arange(n)
    w = (i[:, None] - i[None, :]) ** 2.0
    expected = np.outer(cm.sum(axis=1), cm.sum(axis=0)) / total
    denom = (w * expected).sum()
    if denom == 0:
        return np.nan
    return float(1.0 - (w * cm).sum() / denom)


def _ranks(x: NDArray[np.float64]) -> NDArray[np.float64]:
    """Average (mid) ranks, 1-based, as scipy.stats.rankdata(method='average')."""
    order = np.argsort(x, kind="mergesort")
    xs = x[order]
    new = np.concatenate([[True], xs[1:] != xs[:-1]])
    start = np.flatnonzero(new)
    end = np.append(start[1:], xs.size)
    avg = (start + end + 1) / 2.0
    ranks = np.empty(x.size)
    ranks[order] = np.repeat(avg, end - start)
    return ranks


def roc_auc(positive: ArrayLike, score: ArrayLike) -> float:
    """Area under the ROC curve (Mann-Whitney U / (n_pos n_neg)); NaN with one class only."""
    pos = np.asarray(positive, dtype=bool)
    s = np.asarray(score, dtype=np.float64)
    n_pos = int(pos.sum())
    n_neg = pos.size - n_pos
    if n_pos == 0 or n_neg == 0:
        return np.nan
    r = _ranks(s)
    u = r[pos].sum() - n_pos * (n_pos + 1) / 2.0
    return float(u / (n_pos * n_neg))


def _roc_points(
    pos: NDArray[np.bool_], s: NDArray[np.float64]
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Cumulative (true positives, false positives) at each distinct threshold, descending."""
    order = np.argsort(-s, kind="mergesort")
    ss = s[order]
    pp = pos[order]
    last = np.append(ss[1:] != ss[:-1], True)  # last index of each distinct score
    tps = np.cumsum(pp)[last].astype(np.float64)
    fps = np.cumsum(~pp)[last].astype(np.float64)
    return tps, fps


def average_precision(positive: ArrayLike, score: ArrayLike) -> float:
    """Average precision ``sum_n (R_n - R_{n-1}) P_n`` (NaN without positives)."""
    pos = np.asarray(positive, dtype=bool)
    s = np.asarray(score, dtype=np.float64)
    if not pos.any():
        return np.nan
    tps, fps = _roc_points(pos, s)
    precision = tps / (tps + fps)
    recall = tps / tps[-1]
    drecall = np.diff(np.concatenate([[0.0], recall]))
    return float(np.sum(drecall * precision))


def recall_at_false_alarm(positive: ArrayLike, score: ArrayLike, rate: float = 0.01) -> float:
    """Best recall of flagged levels at a false-alarm rate not above `rate` (NaN if undefined)."""
    pos = np.asarray(positive, dtype=bool)
    s = np.asarray(score, dtype=np.float64)
    n_pos = int(pos.sum())
    n_neg = pos.size - n_pos
    if n_pos == 0 or n_neg == 0:
        return np.nan
    tps, fps = _roc_points(pos, s)
    tpr = np.concatenate([[0.0], tps / n_pos])
    fpr = np.concatenate([[0.0], fps / n_neg])
    return float(tpr[fpr <= rate].max())


def flag_rates(cm: NDArray[np.int64]) -> tuple[float, float]:
    """(recall_bad, false_alarm_rate) of predicted grade >= 3 from a 4x4 confusion matrix."""
    cm = np.asarray(cm, dtype=np.float64)
    bad_true = cm[2:].sum()
    good_true = cm[:2].sum()
    recall_bad = cm[2:, 2:].sum() / bad_true if bad_true else np.nan
    far = cm[:2, 2:].sum() / good_true if good_true else np.nan
    return float(recall_bad), float(far)


def score_grades(
    y_true: ArrayLike, proba: ArrayLike, y_pred: ArrayLike, *, false_alarm: float = 0.01
) -> dict[str, object]:
    """Every score of one set of predictions.

    Parameters
    ----------
    y_true : array-like of int, shape (n,)
        True grades 1-4.
    proba : array-like of float, shape (n, 4)
        Predicted probabilities of grades 1-4.
    y_pred : array-like of int, shape (n,)
        Predicted grades 1-4.
    false_alarm : float, default=0.01
        Rate for ``recall_at_far``.

    Returns
    -------
    dict
        Scalars ``mae``, ``qwk``, ``roc_auc``, ``pr_auc``, ``recall_at_far``, ``recall_bad``,
        ``false_alarm_rate``, ``accuracy``, ``n``; per grade ``precision_<g>``,
        ``recall_<g>``, ``f1_<g>``; and ``confusion`` (nested list, rows true grade).
    """
    y_true = np.asarray(y_true, dtype=np.int64)
    y_pred = np.asarray(y_pred, dtype=np.int64)
    proba = np.asarray(proba, dtype=np.float64)
    cm = confusion(y_true, y_pred)
    prf = per_grade_prf(cm)
    flagged = y_true >= 3
    score = proba[:, 2] + proba[:, 3]
    recall_bad, far = flag_rates(cm)
    out: dict[str, object] = {
        "n": int(y_true.size),
        "mae": mean_absolute_grade_error(y_true, y_pred),
        "qwk": quadratic_weighted_kappa(cm),
        "accuracy": float(np.trace(cm) / cm.sum()) if cm.sum() else np.nan,
        "roc_auc": roc_auc(flagged, score),
        "pr_auc": average_precision(flagged, score),
        "recall_at_far": recall_at_false_alarm(flagged, score, false_alarm),
        "recall_bad": recall_bad,
        "false_alarm_rate": far,
    }
    for g in range(N_GRADES):
        for k in ("precision", "recall", "f1"):
            out[f"{k}_{g + 1}"] = float(prf[k][g])
    out["confusion"] = cm.tolist()
    return out
