"""Rule verdicts + model probabilities -> graded flag, confidence and reasons.

The combiner turns, for one variable over a whole batch,

* the rule verdicts of a :class:`~qcflag.checks.base.CheckTable` and
* (optionally) the model's probabilities of grades 1-4

into a :class:`~qcflag.result.VariableFlags`: a graded flag per level, the probability the
combiner gives to that grade (its confidence), and the reasons (checks that fired, model
features that pushed the grade up). The maths is written out in ``docs/combine.md``; in
short:

1. **Forced grades.** Checks in :data:`FORCING` detect physically impossible values
   (outside the global range, pressure not increasing, impossible date or position, on
   land, a whole profile stuck at one value). Where one fires, its grade is the flag,
   whatever the model says, with confidence 1.
2. **Fusion** (log-linear opinion pool). For the other checks, each verdict ``v_r``
   contributes a Laplace-smoothed log likelihood ratio ``log P(v_r | g) / P(v_r)``
   estimated on cross-validation folds; the fused score of grade ``g`` is
   ``alpha * log p_model(g) + sum_r beta_r * llr_r(v_r, g) + b_g`` and the fused
   probability its softmax. The non-negative weights are fitted by maximum likelihood on
   out-of-fold predictions (:func:`fit_fusion`); ``alpha`` plays the role of a temperature
   and the ``beta_r`` discount rules whose information the model already carries.
3. **Calibration.** Isotonic regression of the fused ``P(grade >= 3)`` on the same
   out-of-fold data; the within-{1, 2} and within-{3, 4} proportions are kept.
4. **Decision.** The flag minimises the expected ordinal cost ``sum_t p_t C[t, c]``
   (:data:`DEFAULT_COST`); ``caution`` lowers the cost of higher grades by ``caution * c``,
   so raising it never lowers a flag. Alternatively a threshold on ``P(grade >= 3)``
   chosen for a target recall or a review budget (:func:`choose_threshold`).

Automated flags assist expert quality control; they do not replace it.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import asdict, dataclass, field, replace
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd

from qcflag.exceptions import QCFlagError
from qcflag.result import VariableFlags
from qcflag.schemes import State

if TYPE_CHECKING:
    from numpy.typing import ArrayLike, NDArray

    from qcflag.checks.base import CheckTable

__all__ = [
    "DEFAULT_COST",
    "FORCING",
    "DecisionError",
    "DecisionWarning",
    "FusionParams",
    "choose_threshold",
    "combine",
    "decide",
    "expected_cost",
    "explain",
    "fit_fusion",
    "forced_grades",
    "fuse",
    "reliability_curve",
    "rules_confidence",
]

GRADES = np.array([1, 2, 3, 4], dtype=np.int8)

FORCING: frozenset[str] = frozenset(
    {"global_range", "pressure_increasing", "position", "date", "on_land", "impossible_speed",
     "stuck_value"}
)
"""Checks whose verdict forces the flag: they detect values that cannot be physical.

``global_range`` (Argo test 6), ``pressure_increasing`` (test 8), ``date`` (test 2),
``position`` (test 3), ``on_land`` (test 4), ``impossible_speed`` (test 5, a fix no ship or
float could reach; its temperature and salinity take grade 3 by default, the position itself
4 in Argo) and ``stuck_value`` (test 13, the whole profile identical) give grade 4 in the Argo
real-time manual (ARGO-QC section 2.1.2, via
../shared/reference/qc-standards.md section 1.3) and describe values no ocean can produce.
Spike, gradient, digit rollover, density inversion, climatology, regional range, flat line
and below-sea-floor are *not* forcing: each can fire on real water (fronts, sharp
thermoclines, coarse bathymetry), so they enter the fusion as evidence instead.
"""

DEFAULT_COST: NDArray[np.float64] = np.array(
    [
        [0.0, 1.0, 2.0, 3.0],
        [3.0, 0.0, 1.0, 2.0],
        [6.0, 3.0, 0.0, 1.0],
        [7.0, 4.0, 1.0, 0.0],
    ]
)
"""Default ordinal cost ``C[true - 1, chosen - 1]`` (this project's choice, not a published
value).

It is additive over the three grade boundaries: crossing boundary ``k`` (between grades
``k`` and ``k + 1``) upwards when the truth is below costs ``a_k = 1``; failing to cross it
when the truth is above costs ``b = (3, 3, 1)``. A missed probably-bad or bad value reaches
users unseen, whereas an over-cautious flag costs a reviewer one look, hence ``b_2 = 3``.
Because the costs are additive, the Bayes decision splits into one test per boundary,
``P(grade > k) > a_k / (a_k + b_k)``: grade >= 2 where ``P(grade >= 2) > 0.25``, grade >= 3
where ``P(grade >= 3) > 0.25``, grade 4 where ``P(grade = 4) > 0.5``. The thresholds do not
decrease with ``k``, so the three tests never contradict each other.
"""

# verdict grade (0 n/a, 1 pass, 2, 3, 4) -> row of a likelihood table
_VERDICT_ROW = np.array([0, 1, 1, 2, 3], dtype=np.int64)
_N_VERDICTS = 4
_EPS = 1e-6

RULE_PRIOR = np.array(
    [
        [0.0, 0.0, 0.0, 0.0],  # n/a: no prior (its ratios are set to 0 anyway)
        [0.998, 0.99, 0.6, 0.6],  # pass
        [0.001, 0.005, 0.3, 0.1],  # verdict 3
        [0.001, 0.005, 0.1, 0.3],  # verdict 4
    ]
)
"""Prior ``P(verdict | grade)`` of a rule (rows n/a, pass, 3, 4; columns grades 1-4).

qcflag's choice, not a published value: a published check rarely fires on good water and
fires on a good share of the faults it is meant for, with its own grade more often than the
other. It matters only for checks with little evidence in the training archive (a fault
kind absent from it); with many levels the counts dominate."""

RULE_PRIOR_LEVELS = 20.0
"""Strength of :data:`RULE_PRIOR` in pseudo-levels per grade."""
MODEL_MIX = 0.05
"""Share of a uniform distribution mixed into the model's probabilities before the pool.

``log((1 - MODEL_MIX) p + MODEL_MIX / 4)`` bounds what one confidently wrong model
probability costs in the fitted likelihood (at most ``log(80)`` nats instead of
``log(1e6)``): out-of-fold models on a few cruises are sometimes sure and wrong (manual
flags carry operator mistakes), and without the bound a handful of such levels drove the
fitted model weight to zero, leaving rules-only flags."""


class DecisionError(QCFlagError, ValueError):
    """Invalid decision settings (caution, target recall, review budget, threshold)."""


class DecisionWarning(UserWarning):
    """A decision setting the model's validation data say will cost many false alarms."""


COSTLY_SHARE = 0.05
"""Warn when a target recall flags more than this share of the out-of-fold levels."""


# ----------------------------------------------------------------------------- fusion
@dataclass
class FusionParams:
    """Fitted parameters of the log-linear pool and its calibration (JSON-serialisable).

    Parameters
    ----------
    variable : str
        Variable the parameters were fitted for.
    model_weight : float
        ``alpha``, the exponent of the model's probabilities.
    bias : list of float
        ``b_g`` for grades 1-4 (``b_1 = 0``).
    rules : dict
        ``check name -> {"weight": beta_r, "llr": 4x4 nested list}``: the smoothed log
        likelihood ratio ``log P(v | g) / P(v)``, rows verdict (n/a, pass, 3, 4), columns
        grade 1-4.
    calibration_x, calibration_y : list of float
        Isotonic map of the fused ``P(grade >= 3)`` (breakpoints; empty = identity).
    bad_quantiles : list of float
        Quantiles 0, 0.001, ..., 1 of calibrated ``P(grade >= 3)`` over out-of-fold levels
        that are truly probably bad or bad, estimated from the manually flagged ones with the
        operators' false flags removed in distribution (:func:`_denoised_bad_quantiles`):
        the threshold reaching recall ``r`` is the ``1 - r`` quantile.
    manual_bad_noise : float
        Estimated share of the manually flagged (>= 3) out-of-fold levels that look like
        good ones (operators' false flags); 0 where not estimated.
    all_quantiles : list of float
        The same quantiles over all out-of-fold levels (for a review budget).
    pass_quantiles : list of float
        The same quantiles over the out-of-fold levels the operators passed (manual grade
        1 or 2), standing in for the good levels (for a false-alarm rate).
    n_levels : int
        Number of levels the parameters were fitted on.
    """

    variable: str
    model_weight: float = 1.0
    bias: list[float] = field(default_factory=lambda: [0.0, 0.0, 0.0, 0.0])
    rules: dict[str, dict[str, Any]] = field(default_factory=dict)
    calibration_x: list[float] = field(default_factory=list)
    calibration_y: list[float] = field(default_factory=list)
    bad_quantiles: list[float] = field(default_factory=list)
    all_quantiles: list[float] = field(default_factory=list)
    n_levels: int = 0
    manual_bad_noise: float = 0.0
    pass_quantiles: list[float] = field(default_factory=list)

    def to_dict(self) -> dict[str, Any]:
        """Plain-JSON form (lists and floats only)."""
        return asdict(self)

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> FusionParams:
        """Rebuild from :meth:`to_dict` output, validating shapes."""
        try:
            out = cls(**dict(data))
            rules = {
                str(k): {"weight": float(v["weight"]),
                         "llr": np.asarray(v["llr"], dtype=float).reshape(4, 4).tolist()}
                for k, v in out.rules.items()
            }
        except (TypeError, KeyError, ValueError) as exc:
            raise QCFlagError(f"fusion parameters are malformed ({exc}); refit the model") from None
        out.rules = rules
        if len(out.bias) != 4 or len(out.calibration_x) != len(out.calibration_y):
            raise QCFlagError("fusion parameters are malformed (bias/calibration); refit the model")
        return out

    def threshold_for_recall(self, target_recall: float) -> float:
        """Threshold on calibrated ``P(grade >= 3)`` reaching `target_recall` out of fold."""
        if not self.bad_quantiles:
            raise DecisionError("the model holds no validation data for a target recall; "
                                "refit it or use --caution")
        _check_fraction(target_recall, "target recall")
        q = np.asarray(self.bad_quantiles)
        return float(np.interp(1.0 - target_recall, np.linspace(0, 1, q.size), q))

    def threshold_for_false_alarms(self, rate: float) -> float:
        """Threshold on calibrated ``P(grade >= 3)`` flagging about `rate` of good levels.

        The smallest value above the ``1 - rate`` quantile over the out-of-fold levels the
        operators passed (Neyman-Pearson: the most detections for that false-alarm rate).
        Levels the operators missed push the quantile up, so the rate errs low.
        """
        if not self.pass_quantiles:
            raise DecisionError("the model holds no validation data for a false-alarm rate; "
                                "refit it or use --caution")
        _check_fraction(rate, "false-alarm rate")
        if rate <= 0:
            return math.inf
        q = np.asarray(self.pass_quantiles)
        at = float(np.interp(1.0 - rate, np.linspace(0, 1, q.size), q))
        return float(np.nextafter(at, math.inf))  # strictly above: ties at `at` pass

    def flagged_share(self, threshold: float) -> float:
        """Share of the out-of-fold levels whose calibrated ``P(grade >= 3)`` reaches it."""
        if not self.all_quantiles:
            return math.nan
        q = np.asarray(self.all_quantiles)
        below = np.searchsorted(q, threshold, side="left")  # quantile points under it
        return float(1.0 - max(below - 1, 0) / (q.size - 1)) if below else 1.0

    def threshold_for_budget(self, review_budget: float) -> float:
        """Threshold on calibrated ``P(grade >= 3)`` flagging `review_budget` of the levels."""
        if not self.all_quantiles:
            raise DecisionError("the model holds no validation data for a review budget; "
                                "refit it or use --caution")
        _check_fraction(review_budget, "review budget")
        q = np.asarray(self.all_quantiles)
        if review_budget <= 0:
            return math.inf
        return float(np.interp(1.0 - review_budget, np.linspace(0, 1, q.size), q))


def _check_fraction(value: float, what: str) -> None:
    if not (0.0 <= float(value) <= 1.0) or not np.isfinite(value):
        raise DecisionError(f"{what} must be between 0 and 1, got {value}")


def _verdict_rows(checks: CheckTable, variable: str, names: Sequence[str]) -> NDArray[np.int64]:
    """Verdict row index per level and rule, shape (n_levels, len(names))."""
    return _verdict_rows_slice(checks, variable, names, 0, checks.n_levels)


def _pool_scores(
    proba: NDArray[np.float64],
    rows: NDArray[np.int64],
    llr: NDArray[np.float64],
) -> NDArray[np.float64]:
    """Design tensor Z (n, 4, 1 + R + 3): log p, rule llr per grade, grade one-hots 2-4."""
    n = proba.shape[0]
    r = rows.shape[1]
    z = np.zeros((n, 4, 1 + r + 3))
    z[:, :, 0] = np.log((1.0 - MODEL_MIX) * np.clip(proba, 0.0, 1.0) + MODEL_MIX / 4.0)
    for j in range(r):
        z[:, :, 1 + j] = llr[j][rows[:, j]]
    for g in range(1, 4):
        z[:, g, 1 + r + g - 1] = 1.0
    return z


def _softmax(s: NDArray[np.float64]) -> NDArray[np.float64]:
    s = s - s.max(axis=1, keepdims=True)
    e = np.exp(s)
    return e / e.sum(axis=1, keepdims=True)


def _calibrate(p: NDArray[np.float64], fusion: FusionParams) -> NDArray[np.float64]:
    """Apply the isotonic map to P(grade >= 3), keeping within-group proportions."""
    if not fusion.calibration_x:
        return p
    bad = p[:, 2:].sum(axis=1)
    new = np.interp(bad, fusion.calibration_x, fusion.calibration_y)
    new = np.clip(new, _EPS, 1.0 - _EPS)
    out = p.copy()
    out[:, 2:] *= (new / np.maximum(bad, 1e-300))[:, None]
    out[:, :2] *= ((1.0 - new) / np.maximum(1.0 - bad, 1e-300))[:, None]
    return out / out.sum(axis=1, keepdims=True)


def fuse(
    checks: CheckTable,
    variable: str,
    proba: ArrayLike,
    fusion: FusionParams | None = None,
) -> NDArray[np.float64]:
    """Fused and calibrated probability of grades 1-4 per level.

    Parameters
    ----------
    checks : CheckTable
        Rule results on the batch.
    variable : str
        Variable to fuse.
    proba : array-like of shape (n_levels, 4)
        The model's probabilities of grades 1-4.
    fusion : FusionParams, optional
        Fitted pool; None returns the model's probabilities (renormalised) unchanged.

    Returns
    -------
    ndarray of shape (n_levels, 4)
        Rows sum to 1.
    """
    p = np.asarray(proba, dtype=np.float64)
    if p.ndim != 2 or p.shape != (checks.n_levels, 4):
        raise QCFlagError(
            f"{variable}: model probabilities have shape {p.shape}, expected "
            f"({checks.n_levels}, 4); the model does not match this batch"
        )
    p = np.where(np.isfinite(p), np.clip(p, 0.0, 1.0), 0.25)
    p = p / np.maximum(p.sum(axis=1, keepdims=True), 1e-300)
    if fusion is None:
        return p
    names = list(fusion.rules)
    llr = np.array([fusion.rules[k]["llr"] for k in names], dtype=float).reshape(-1, 4, 4)
    theta = np.concatenate(
        [[fusion.model_weight], [fusion.rules[k]["weight"] for k in names],
         np.asarray(fusion.bias[1:], dtype=float)]
    )
    out = np.empty_like(p)
    step = 200_000  # bounded memory for the design tensor
    for a in range(0, p.shape[0], step):
        b = min(a + step, p.shape[0])
        rows = _verdict_rows_slice(checks, variable, names, a, b)
        z = _pool_scores(p[a:b], rows, llr)
        out[a:b] = _softmax(z @ theta)
    return _calibrate(out, fusion)


def _verdict_rows_slice(
    checks: CheckTable, variable: str, names: Sequence[str], a: int, b: int
) -> NDArray[np.int64]:
    out = np.zeros((b - a, len(names)), dtype=np.int64)
    for j, name in enumerate(names):
        r = checks.results.get((name, variable))
        if r is not None:
            out[:, j] = _VERDICT_ROW[np.clip(r.grade[a:b], 0, 4)]
    return out


def fit_fusion(
    y: ArrayLike,
    proba_oof: ArrayLike,
    checks_oof: CheckTable,
    variable: str,
    *,
    max_levels: int = 150_000,
    calibrate: bool = True,
    seed: int = 0,
) -> FusionParams:
    """Fit the log-linear pool and its calibration on out-of-fold predictions.

    Parameters
    ----------
    y : array-like of int, shape (n_levels,)
        Reference grade 1-4 per level (manual flags of the training archive); other values
        (0, negative) mark levels left out.
    proba_oof : array-like of shape (n_levels, 4)
        The model's out-of-fold probabilities (each level predicted by a model that did not
        see its cruise).
    checks_oof : CheckTable
        Rule results on the same levels.
    variable : str
        Variable fitted.
    max_levels : int, default=150_000
        Levels where a :data:`FORCING` check fires are left out (the pool never decides
        them). Levels used for the weight fit: every probably-bad or bad level and a random sample
        of the others, reweighted so the fit is unbiased.
    calibrate : bool, default=True
        Fit the isotonic calibration of ``P(grade >= 3)``.
    seed : int, default=0
        Seed of the subsample.

    Returns
    -------
    FusionParams
    """
    from scipy.optimize import minimize
    from sklearn.isotonic import IsotonicRegression

    y = np.asarray(y).astype(np.int64)
    p = np.asarray(proba_oof, dtype=np.float64)
    if p.shape != (y.size, 4) or checks_oof.n_levels != y.size:
        raise QCFlagError(f"{variable}: out-of-fold probabilities, grades and checks differ "
                          "in length; fit on the same levels")
    keep = (y >= 1) & (y <= 4) & np.isfinite(p).all(axis=1)
    # levels a forcing check decides never reach the pool: leave them out of its fit (a
    # whole profile with an impossible date would otherwise dominate the weights)
    for (name, v), r in checks_oof.results.items():
        if v == variable and name in FORCING:
            keep &= ~(r.grade >= 3)
    idx = np.flatnonzero(keep)
    if idx.size == 0:
        raise QCFlagError(f"{variable}: no assessed levels to fit the fusion on")
    names = [c for c in checks_oof.checks_for(variable) if c not in FORCING]
    rows_all = _verdict_rows(checks_oof, variable, names)[idx]
    yk = y[idx] - 1
    pk = p[idx]
    pk = np.clip(pk, 0, 1) / np.maximum(np.clip(pk, 0, 1).sum(axis=1, keepdims=True), 1e-300)

    # likelihood ratio tables log P(v | g) / P(v): counts, Laplace smoothing, and a prior of
    # RULE_PRIOR_LEVELS pseudo-levels per grade that takes the published rule at its word
    llr = np.zeros((len(names), _N_VERDICTS, 4))
    n_g = np.bincount(yk, minlength=4).astype(float)
    prior = RULE_PRIOR_LEVELS * RULE_PRIOR
    fired = np.zeros(len(names), dtype=bool)
    for j in range(len(names)):
        cnt = np.zeros((_N_VERDICTS, 4))
        np.add.at(cnt, (rows_all[:, j], yk), 1.0)
        fired[j] = cnt[2:].sum() > 0
        cnt += 1.0 + prior
        p_v_g = cnt / cnt.sum(axis=0, keepdims=True)
        # P(v) under the training grade mix, so that a verdict's ratios average to ~0
        p_v = p_v_g @ (n_g + 1.0) / (n_g + 1.0).sum()
        llr[j] = np.log(p_v_g) - np.log(p_v)[:, None]
    # a check that did not apply (verdict n/a: missing value, level out of its range) is
    # no evidence either way; only its pass/fail verdicts carry information
    llr[:, 0, :] = 0.0

    # subsample for the weight fit: all bad levels plus a weighted sample of the others
    rng = np.random.default_rng(seed)
    w = np.ones(idx.size)
    sel = np.arange(idx.size)
    if idx.size > max_levels:
        bad = np.flatnonzero(yk >= 2)
        good = np.flatnonzero(yk < 2)
        n_good = max(max_levels - bad.size, min(good.size, 10_000))
        pick = rng.choice(good, size=min(n_good, good.size), replace=False)
        sel = np.sort(np.concatenate([bad, pick]))
        w = np.where(yk[sel] < 2, good.size / max(pick.size, 1), 1.0)
    z = _pool_scores(pk[sel], rows_all[sel], llr)
    ys = yk[sel]
    wn = w / w.sum()
    onehot = np.zeros((ys.size, 4))
    onehot[np.arange(ys.size), ys] = 1.0
    ridge = 1e-4

    def nll(theta: NDArray[np.float64]) -> tuple[float, NDArray[np.float64]]:
        s = z @ theta
        s = s - s.max(axis=1, keepdims=True)
        lse = np.log(np.exp(s).sum(axis=1))
        val = float(np.sum(wn * (lse - s[np.arange(ys.size), ys])))
        q = np.exp(s - lse[:, None])
        grad = np.einsum("ng,ngj->j", (q - onehot) * wn[:, None], z)
        val += ridge * float(theta[1:] @ theta[1:])
        grad[1:] += 2 * ridge * theta[1:]
        return val, grad

    n_par = z.shape[2]
    theta0 = np.zeros(n_par)
    theta0[0] = 1.0
    # a check that never fired here cannot be weighed from these data: it keeps weight 1
    # and its prior likelihood ratios (the published rule taken at its word)
    theta0[1:1 + len(names)] = np.where(fired, 0.0, 1.0)
    bounds = ([(0.0, None)] + [(0.0, None) if f else (1.0, 1.0) for f in fired]
              + [(None, None)] * 3)
    res = minimize(nll, theta0, jac=True, method="L-BFGS-B", bounds=bounds)
    theta = res.x
    fusion = FusionParams(
        variable=variable,
        model_weight=float(theta[0]),
        bias=[0.0, *(float(v) for v in theta[1 + len(names):])],
        rules={name: {"weight": float(theta[1 + j]), "llr": llr[j].tolist()}
               for j, name in enumerate(names)},
        n_levels=int(idx.size),
    )
    fused = fuse(_subset_table(checks_oof, idx), variable, pk, fusion)
    p_bad = fused[:, 2:].sum(axis=1)
    y_bad = yk >= 2
    if calibrate and y_bad.any() and (~y_bad).any():
        iso = IsotonicRegression(y_min=0.0, y_max=1.0, out_of_bounds="clip")
        iso.fit(p_bad, y_bad.astype(float))
        fusion.calibration_x = [float(v) for v in iso.X_thresholds_]
        fusion.calibration_y = [float(v) for v in iso.y_thresholds_]
        p_bad = _calibrate(fused, fusion)[:, 2:].sum(axis=1)
    qs = np.linspace(0, 1, 1001)
    if y_bad.any():
        fusion.manual_bad_noise, fusion.bad_quantiles = _denoised_bad_quantiles(
            p_bad[y_bad], p_bad[~y_bad], qs)
    fusion.all_quantiles = [float(v) for v in np.quantile(p_bad, qs)]
    if (~y_bad).any():
        fusion.pass_quantiles = [float(v) for v in np.quantile(p_bad[~y_bad], qs)]
    return fusion


def _denoised_bad_quantiles(
    p_bad_flagged: NDArray[np.float64], p_bad_passed: NDArray[np.float64],
    qs: NDArray[np.float64],
) -> tuple[float, list[float]]:
    """Quantiles of ``P(grade >= 3)`` over the truly probably-bad-or-bad levels, estimated.

    Manually flagged levels (grade >= 3) include an operator's false flags, which look like
    good levels; a target recall taken from their raw quantiles would chase them down into
    the good levels. The flagged levels' distribution is modelled as the mixture
    ``F_flagged = (1 - eps) F_bad + eps F_good``, with ``F_good`` the distribution over the
    manually passed levels, and ``eps`` estimated as the largest share compatible with it,
    ``min_t F_flagged(t) / F_good(t)`` over ``t`` in the upper half of ``F_good``
    (mixture proportion estimation; Blanchard, Lee & Scott 2010; Scott 2015). Then
    ``F_bad = (F_flagged - eps F_good) / (1 - eps)``, made a distribution (clipped to
    [0, 1], non-decreasing), is inverted at `qs`.

    Returns
    -------
    eps : float
        Estimated share of manually flagged levels that look like good ones.
    quantiles : list of float
        Quantiles of the estimated ``F_bad`` at `qs`.
    """
    flagged = np.sort(p_bad_flagged)
    if p_bad_passed.size == 0:
        return 0.0, [float(v) for v in np.quantile(flagged, qs)]
    passed = np.sort(p_bad_passed)
    grid = np.unique(np.concatenate([flagged, np.quantile(passed, np.linspace(0, 1, 2001))]))
    f_flag = np.searchsorted(flagged, grid, side="right") / flagged.size
    f_pass = np.searchsorted(passed, grid, side="right") / passed.size
    upper = f_pass >= 0.5
    eps = float(np.clip(np.min(f_flag[upper] / f_pass[upper]), 0.0, 0.99))
    f_bad = np.clip((f_flag - eps * f_pass) / (1.0 - eps), 0.0, 1.0)
    f_bad = np.maximum.accumulate(f_bad)
    f_bad[-1] = 1.0
    # quantile q: the smallest grid value whose estimated CDF reaches q
    pos = np.minimum(np.searchsorted(f_bad, qs, side="left"), grid.size - 1)
    return eps, [float(v) for v in grid[pos]]


def _subset_table(checks: CheckTable, idx: NDArray[np.int64]) -> CheckTable:
    from qcflag.checks.base import CheckResult, CheckTable

    return CheckTable(
        {k: CheckResult(r.statistic[idx], r.grade[idx]) for k, r in checks.results.items()},
        int(idx.size),
    )


def reliability_curve(y_bad: ArrayLike, p_bad: ArrayLike, n_bins: int = 10) -> pd.DataFrame:
    """Observed frequency of probably-bad-or-bad levels per bin of predicted probability.

    Parameters
    ----------
    y_bad : array-like of bool, shape (n_levels,)
        True where the level is (manually or truly) probably bad or bad.
    p_bad : array-like of float, shape (n_levels,)
        Predicted ``P(grade >= 3)``.
    n_bins : int, default=10
        Equal-width bins on [0, 1].

    Returns
    -------
    pandas.DataFrame
        One row per non-empty bin: ``bin_lower``, ``bin_upper``, ``n``, ``mean_predicted``,
        ``observed``; a calibrated predictor has ``observed`` close to ``mean_predicted``.
    """
    y = np.asarray(y_bad, dtype=float)
    p = np.asarray(p_bad, dtype=float)
    ok = np.isfinite(p)
    y, p = y[ok], np.clip(p[ok], 0.0, 1.0)
    edges = np.linspace(0.0, 1.0, n_bins + 1)
    b = np.clip(np.searchsorted(edges, p, side="right") - 1, 0, n_bins - 1)
    n = np.bincount(b, minlength=n_bins)
    sp = np.bincount(b, weights=p, minlength=n_bins)
    sy = np.bincount(b, weights=y, minlength=n_bins)
    nz = n > 0
    return pd.DataFrame(
        {
            "bin_lower": edges[:-1][nz],
            "bin_upper": edges[1:][nz],
            "n": n[nz],
            "mean_predicted": sp[nz] / n[nz],
            "observed": sy[nz] / n[nz],
        }
    )


# --------------------------------------------------------------------------- decision
def choose_threshold(
    p_bad: ArrayLike,
    y_bad: ArrayLike | None = None,
    *,
    target_recall: float | None = None,
    review_budget: float | None = None,
) -> float:
    """Threshold on ``P(grade >= 3)`` for a target recall or a review budget.

    Levels with ``p_bad >= threshold`` are flagged probably bad or bad.

    Parameters
    ----------
    p_bad : array-like of float
        ``P(grade >= 3)`` on validation levels.
    y_bad : array-like of bool, optional
        Truth on the same levels; required with `target_recall`.
    target_recall : float, optional
        Smallest share of the truly probably-bad-or-bad levels that must be flagged: the
        threshold is the highest one that reaches it.
    review_budget : float, optional
        Share of all levels a person will look at: the threshold flags the top share.

    Returns
    -------
    float
        The threshold (``inf`` flags nothing).

    Raises
    ------
    DecisionError
        If not exactly one of `target_recall` and `review_budget` is given, a value is out
        of [0, 1], or `y_bad` is missing for a target recall.

    Examples
    --------
    >>> choose_threshold([0.9, 0.8, 0.1, 0.05], [True, True, False, True], target_recall=0.6)
    0.8
    >>> choose_threshold([0.9, 0.8, 0.1, 0.05], review_budget=0.25)
    0.9
    """
    if (target_recall is None) == (review_budget is None):
        raise DecisionError("give exactly one of target recall and review budget")
    p = np.asarray(p_bad, dtype=float)
    if target_recall is not None:
        _check_fraction(target_recall, "target recall")
        if y_bad is None:
            raise DecisionError("a target recall needs the truth (y_bad) on validation levels")
        pos = np.sort(p[np.asarray(y_bad, dtype=bool)])[::-1]
        if pos.size == 0:
            return math.inf
        k = math.ceil(target_recall * pos.size - 1e-9)
        return math.inf if k <= 0 else float(pos[k - 1])
    assert review_budget is not None
    _check_fraction(review_budget, "review budget")
    srt = np.sort(p)[::-1]
    k = math.floor(review_budget * srt.size + 1e-9)
    if k <= 0:
        return math.inf
    t = float(srt[k - 1])
    # ties at the threshold would exceed the budget: move above them
    if k < srt.size and srt[k] == t:
        t = float(np.nextafter(t, np.inf))
    return t


def expected_cost(proba: ArrayLike, cost: ArrayLike | None = None) -> NDArray[np.float64]:
    """Return the expected cost of choosing each grade, ``proba @ C``, shape (n_levels, 4)."""
    c = DEFAULT_COST if cost is None else np.asarray(cost, dtype=float)
    return np.asarray(proba, dtype=float) @ c


def decide(
    proba: ArrayLike,
    *,
    caution: float = 0.0,
    threshold: float | None = None,
    cost: ArrayLike | None = None,
) -> NDArray[np.int8]:
    """Grade minimising expected ordinal cost, moved by `caution` or a threshold.

    Parameters
    ----------
    proba : array-like of shape (n_levels, 4)
        Probabilities of grades 1-4.
    caution : float, default=0.0
        Non-negative; choosing grade ``c`` costs ``caution * c`` less, so the decision can
        only move up as `caution` grows.
    threshold : float, optional
        If given, levels with ``P(grade >= 3) >= threshold`` take the cheaper of 3 and 4,
        the others the cheaper of 1 and 2 (`caution` is then not used).
    cost : array-like of shape (4, 4), optional
        ``C[true - 1, chosen - 1]``; default :data:`DEFAULT_COST`.

    Returns
    -------
    ndarray of int8
        Grades 1-4; ties go to the higher grade.
    """
    if not np.isfinite(caution) or caution < 0:
        raise DecisionError(f"caution must be a non-negative number, got {caution}")
    p = np.asarray(proba, dtype=float)
    ec = expected_cost(p, cost)
    if threshold is not None:
        bad = p[:, 2:].sum(axis=1) >= threshold
        lo = np.where(ec[:, 1] <= ec[:, 0], 2, 1)
        hi = np.where(ec[:, 3] <= ec[:, 2], 4, 3)
        return np.where(bad, hi, lo).astype(np.int8)
    if caution:
        ec = ec - caution * GRADES.astype(float)[None, :]
    # ties (within rounding) go to the higher grade: scan from grade 4 down
    best = ec.min(axis=1, keepdims=True)
    tol = 1e-12 * np.maximum(1.0, np.abs(best))
    near = ec <= best + tol
    return (4 - np.argmax(near[:, ::-1], axis=1)).astype(np.int8)


# --------------------------------------------------------------------------- combine
def rules_confidence(checks: CheckTable, variable: str, grade: ArrayLike) -> NDArray[np.float64]:
    """Heuristic confidence of a rules-only verdict (not a calibrated probability).

    A level that fired ``k`` non-forcing checks gets ``1 - 2**-k`` (each independent
    check that agrees halves the chance of a false alarm: 0.5, 0.75, 0.875, ...); a level
    that passed ``n`` applicable checks gets ``(n + 1) / (n + 2)`` (Laplace's rule of
    succession). Forced grades get 1 in :func:`combine`.
    """
    g = np.asarray(grade)
    grades = [r.grade for (_, v), r in checks.results.items() if v == variable]
    # counts fit the type; booleans are added as their bytes (no conversion pass)
    kind = np.uint8 if len(grades) < 255 else np.int64
    n_fired = np.zeros(checks.n_levels, dtype=kind)
    n_pass = np.zeros(checks.n_levels, dtype=kind)  # first: applicable (grade >= 1)
    for r_grade in grades:
        np.add(n_fired, (r_grade >= 3).view(np.uint8), out=n_fired)
        np.add(n_pass, (r_grade >= 1).view(np.uint8), out=n_pass)
    n_pass -= n_fired  # applicable and not fired: grade 1 or 2
    conf = (n_pass + 1.0) / (n_pass + 2.0)
    bad = np.flatnonzero(g >= 3)
    conf[bad] = 1.0 - 0.5 ** np.maximum(n_fired[bad], 1).astype(np.float64)
    return conf


def _mask_strings(names: Sequence[str], mask: NDArray[np.int64]) -> NDArray[np.object_]:
    """Join the names of each bit mask with ``;`` (once per distinct mask)."""
    out = np.empty(mask.size, dtype=object)
    out.fill("")  # (faster than np.full for object arrays)
    hit = np.flatnonzero(mask)  # few levels fire anything: join only theirs
    if hit.size:
        uniq, inv = np.unique(mask[hit], return_inverse=True)
        strs = np.array(
            [";".join(n for i, n in enumerate(names) if (int(u) >> i) & 1) for u in uniq],
            dtype=object,
        )
        out[hit] = strs[inv]
    return out


def _model_reasons(
    grade: NDArray[np.int8],
    forced: NDArray[np.bool_],
    proba_model: NDArray[np.float64] | None,
    attribution: tuple[Sequence[str], NDArray[np.float64]] | None,
    n_top: int,
) -> tuple[NDArray[np.int64], NDArray[np.object_]]:
    """Top features that pushed each level flagged >= 3 by the model (``model:<feature>``).

    Returns the levels concerned (flagged >= 3 and not forced, when there is a model) and
    their non-empty reason text (``"model"`` when no feature pushed, or no attribution).
    """
    sel = np.flatnonzero((grade >= 3) & ~forced)
    if sel.size == 0 or proba_model is None:
        return sel[:0], np.zeros(0, dtype=object)
    if attribution is None:
        return sel, np.full(sel.size, "model", dtype=object)
    names, contrib = attribution
    c = np.asarray(contrib, dtype=float)[sel]
    names_arr = np.array([f"model:{n}" for n in names] + [""], dtype=object)
    k = min(n_top, c.shape[1])
    top = np.argsort(-c, axis=1, kind="stable")[:, :k]
    val = np.take_along_axis(c, top, axis=1)
    top = np.where(val > 0, top, len(names))  # only features that pushed towards bad
    labels = names_arr[top]
    joined = labels[:, 0].astype(str)
    for j in range(1, k):
        nxt = labels[:, j].astype(str)
        joined = np.where(nxt != "", np.char.add(np.char.add(joined, ";"), nxt), joined)
    joined = np.where(joined == "", "model", joined)
    return sel, joined.astype(object)


def _add_model_reasons(reasons: NDArray[np.object_], sel: NDArray[np.int64],
                       extra: NDArray[np.object_]) -> NDArray[np.object_]:
    """Append the model's reasons `extra` of levels `sel` to `reasons` (``;``), in place."""
    if sel.size:
        base = reasons[sel]
        reasons[sel] = np.where(base != "", base + ";" + extra, extra)
    return reasons


def forced_grades(checks: CheckTable, variable: str) -> NDArray[np.int8]:
    """Grade the :data:`FORCING` checks impose on each level (3 or 4), 0 where none does.

    Parameters
    ----------
    checks : CheckTable
        Rule results on the batch.
    variable : str
        Variable judged.

    Returns
    -------
    ndarray of int8, shape (n_levels,)
    """
    out = np.zeros(checks.n_levels, dtype=np.int8)
    for (name, v), r in checks.results.items():
        if v == variable and name in FORCING:
            hit = np.flatnonzero(r.grade >= 3)  # few levels: work on those only
            out[hit] = np.maximum(out[hit], r.grade[hit])
    return out


def combine(
    checks: CheckTable,
    variable: str,
    proba: ArrayLike | None,
    *,
    caution: float = 0.0,
    threshold: float | None = None,
    fusion: FusionParams | None = None,
    values: ArrayLike | None = None,
    attribution: tuple[Sequence[str], ArrayLike] | None = None,
    cost: ArrayLike | None = None,
    n_top_features: int = 2,
) -> VariableFlags:
    """Graded flags of one variable from rule verdicts and (optionally) model probabilities.

    Parameters
    ----------
    checks : CheckTable
        Rule results on the batch.
    variable : str
        ``"temperature"``, ``"salinity"`` or ``"pressure"``.
    proba : array-like of shape (n_levels, 4) or None
        The model's probabilities of grades 1-4; None for a rules-only run (grade = worst
        rule verdict, :func:`rules_confidence`).
    caution : float, default=0.0
        Moves the decision towards higher grades (see :func:`decide`).
    threshold : float, optional
        Threshold on fused ``P(grade >= 3)`` replacing the cost decision.
    fusion : FusionParams, optional
        Fitted log-linear pool and calibration; None uses the model's probabilities as they
        are.
    values : array-like of float, optional
        The variable's values; NaN levels get state ``MISSING`` and grade 0.
    attribution : (names, array of shape (n_levels, n_features)), optional
        Per-level feature contributions towards worse grades, for the reasons.
    cost : array-like of shape (4, 4), optional
        Cost matrix (default :data:`DEFAULT_COST`).
    n_top_features : int, default=2
        Features named per level in the reasons.

    Returns
    -------
    VariableFlags
        With ``proba`` set when a model was given (forced levels put probability 1 on the
        forced grade; missing levels hold NaN).
    """
    n = checks.n_levels
    rule_grade = checks.verdict(variable)
    forced_grade = forced_grades(checks, variable)
    forced = forced_grade >= 3
    names, mask = checks.fired_mask(variable)

    fused: NDArray[np.float64] | None = None
    p_model: NDArray[np.float64] | None = None
    if proba is None:
        grade = np.where(rule_grade >= 3, rule_grade, 1).astype(np.int8)
        confidence = rules_confidence(checks, variable, grade)
    else:
        p_model = np.asarray(proba, dtype=float)
        fused = fuse(checks, variable, p_model, fusion)
        grade = decide(fused, caution=caution, threshold=threshold, cost=cost)
        confidence = fused[np.arange(n), grade.astype(np.int64) - 1]
    grade = np.where(forced, np.maximum(grade, forced_grade), grade).astype(np.int8)
    confidence = np.where(forced, 1.0, confidence)
    if fused is not None and forced.any():
        fused[forced] = 0.0
        fused[forced, grade[forced].astype(np.int64) - 1] = 1.0

    reasons = _mask_strings(names, mask)
    attr = None
    if attribution is not None:
        attr = (list(attribution[0]), np.asarray(attribution[1], dtype=float))
    reasons = _add_model_reasons(reasons, *_model_reasons(grade, forced, p_model, attr,
                                                          n_top_features))

    state = np.full(n, State.ASSESSED, dtype=np.int8)
    if values is not None:
        missing = ~np.isfinite(np.asarray(values, dtype=float))
        if missing.any():
            state[missing] = State.MISSING
            grade = np.where(missing, 0, grade).astype(np.int8)
            confidence = np.where(missing, np.nan, confidence)
            forced = forced & ~missing
            reasons[missing] = ""
            if fused is not None:
                fused[missing] = np.nan
    return VariableFlags(
        grade=grade.astype(np.int8),
        state=state,
        confidence=confidence.astype(np.float64),
        reasons=np.asarray(reasons, dtype=object),
        rule_grade=rule_grade,
        forced=forced,
        proba=fused,
    )


def explain(
    flags: VariableFlags,
    checks: CheckTable,
    variable: str,
    attribution: tuple[Sequence[str], ArrayLike],
    *,
    n_top_features: int = 2,
) -> VariableFlags:
    """Rebuild the reasons of `flags` with the model's feature attribution.

    Lets a caller compute the (costly) attribution only for the levels that need it, after
    :func:`combine` has decided the grades: levels flagged probably bad or bad by the model
    (not forced) get ``model:<feature>`` for the features that pushed them most.

    Parameters
    ----------
    flags : VariableFlags
        Output of :func:`combine` with a model.
    checks : CheckTable
        The rule results it was built from.
    variable : str
        Its variable.
    attribution : (names, array of shape (n_levels, n_features))
        Feature contributions towards worse grades (rows of other levels are ignored).
    n_top_features : int, default=2
        Features named per level.

    Returns
    -------
    VariableFlags
        The same flags with new reasons.
    """
    names, mask = checks.fired_mask(variable)
    reasons = _mask_strings(names, mask)
    attr = (list(attribution[0]), np.asarray(attribution[1], dtype=float))
    reasons = _add_model_reasons(reasons, *_model_reasons(
        flags.grade, flags.forced, flags.proba, attr, n_top_features))
    reasons[flags.state != State.ASSESSED] = ""
    return replace(flags, reasons=np.asarray(reasons, dtype=object))
