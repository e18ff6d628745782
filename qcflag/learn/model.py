"""A trained qcflag model: one grade estimator per judged variable, with its model card.

:func:`train_model` learns an institution's own flagging from a manually flagged archive:
labels are the manual-flag grades of levels whose state is ``ASSESSED`` (non-ordinal states
such as missing or interpolated are never trained on), groups are cruises, features come from
:func:`qcflag.features.build_features` on the rule set's checks. It cross-validates the chosen
estimator beside the baselines by cruise, fits the chosen estimator on all training cruises,
and (unless disabled) fits the combiner's fusion and calibration
(:func:`qcflag.combine.fit_fusion`) on the out-of-fold probabilities, storing it in the card.
That is the one place ``learn`` reaches up to ``combine``, so that a model trained anywhere
carries its calibration.
"""

from __future__ import annotations

import datetime as _dt
import hashlib
import os
import warnings
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from qcflag.exceptions import QCFlagError
from qcflag.features import FEATURE_SET_VERSION, JUDGED_VARIABLES, build_features
from qcflag.learn.estimators import GRADES, make_estimator
from qcflag.learn.evaluation import CVReport, fit_subsampled, grouped_cross_validate
from qcflag.schemes import State

if TYPE_CHECKING:
    from collections.abc import Iterable

    from numpy.typing import NDArray

    from qcflag.checks.base import CheckTable
    from qcflag.profiles import ProfileBatch

__all__ = [
    "ALL_MODELS",
    "BASELINES",
    "CAUTION",
    "TRAINABLE",
    "QCModel",
    "data_fingerprint",
    "evaluate_model",
    "labels_for",
    "quantisation_scales",
    "quantise",
    "train_model",
]

BASELINES: tuple[str, ...] = ("nominal", "rules", "always-good")
"""Models cross-validated beside the chosen one."""

ALL_MODELS: tuple[str, ...] = ("boosted", "boosted-oblivious", "logistic-at", "logistic-it",
                               *BASELINES)
"""Models cross-validated with ``compare=True``."""

TRAINABLE: tuple[str, ...] = ("boosted", "boosted-oblivious", "logistic-at", "logistic-it",
                              "nominal")
"""Models ``train_model`` (and ``qcflag train --estimator``) can fit as the chosen one."""

CAUTION = ("Automated flags assist expert quality control and do not replace it; the data "
           "programme's own standards prevail.")


QUANTISE_STEP = 0.1
"""Step of the feature grid in ``arcsinh(x / scale)`` (see :func:`quantise`)."""
_QUANTISE_LIMIT = 12.7  # |arcsinh(x / scale)| kept: at most 255 grid values per column


def quantisation_scales(X: NDArray[np.float64]) -> NDArray[np.float64]:
    """Per-column scale of the feature grid: median non-zero ``|x|``, 0 = leave as is.

    Columns with at most 255 distinct finite values (grades, counts, flags, per-profile
    values of a small archive) are left as they are (scale 0).
    """
    scales = np.zeros(X.shape[1])
    for j in range(X.shape[1]):  # loop over feature columns (a few dozen), not levels
        col = X[:, j]
        col = col[np.isfinite(col)]
        if np.unique(col).size <= 255:
            continue
        a = np.abs(col[col != 0])
        scales[j] = float(np.median(a)) if a.size else 1.0
    return scales


def quantise(X: NDArray[np.float64], scales: NDArray[np.float64]) -> NDArray[np.float64]:
    """Snap features to a fixed grid, uniform in ``arcsinh(x / scale)`` with step 0.1.

    The grid is about 0.1 scale apart near zero and 10 % apart in relative terms far from
    it, with at most 255 values per column: the resolution gradient boosting keeps anyway
    (255 bins), but known before training, so the boosted models bin each column by its
    distinct values instead of computing 254 weighted percentiles per column and fit (the
    dominant cost of training with class weights). The same map is applied at prediction
    (the scales are stored in the model card), so the models see the same grid. NaN stays
    NaN; columns with scale 0 are left as they are.
    """
    out = np.array(X, dtype=np.float64, copy=True)
    cols = np.flatnonzero(scales > 0)
    if cols.size:
        s = scales[cols]
        with np.errstate(invalid="ignore"):
            u = np.clip(np.arcsinh(out[:, cols] / s), -_QUANTISE_LIMIT, _QUANTISE_LIMIT)
            out[:, cols] = s * np.sinh(np.round(u / QUANTISE_STEP) * QUANTISE_STEP)
    return out


def data_fingerprint(batch: ProfileBatch) -> str:
    """SHA-256 over the level values, offsets and manual flags of a batch (hex)."""
    h = hashlib.sha256()
    h.update(np.ascontiguousarray(batch.offsets, dtype="<i8").tobytes())
    for name in ("pressure", "temperature", "salinity"):
        h.update(name.encode())
        h.update(np.ascontiguousarray(batch.values(name), dtype="<f8").tobytes())
    h.update(batch.scheme.encode())
    for name in sorted(batch.flags):
        h.update(name.encode())
        h.update(np.ascontiguousarray(batch.flags[name], dtype=np.int8).tobytes())
    return h.hexdigest()


def labels_for(batch: ProfileBatch, variable: str) -> NDArray[np.int64]:
    """Training label per level: the manual grade 1-4, or 0 where there is none.

    Levels whose manual flag is a non-ordinal state (missing, not evaluated, changed,
    interpolated, no flag) or whose value is missing get 0 and are left out of training.
    """
    grade, state = batch.manual_grade(variable)
    ok = (state == State.ASSESSED) & (grade >= 1) & (grade <= 4)
    ok &= np.isfinite(batch.values(variable))
    return np.where(ok, grade, 0).astype(np.int64)


def _versions() -> dict[str, str]:
    import importlib.metadata as md

    from qcflag._version import __version__

    out = {"qcflag": __version__}
    for pkg in ("numpy", "scikit-learn", "mord", "scipy", "pandas"):
        try:
            out[pkg] = md.version(pkg)
        except md.PackageNotFoundError:  # pragma: no cover
            out[pkg] = "not installed"
    return out


@dataclass
class QCModel:
    """Fitted grade models for temperature and salinity, with what they were trained on.

    Parameters
    ----------
    estimators : dict of str to estimator
        ``variable -> fitted estimator`` (see :mod:`qcflag.learn.estimators`).
    feature_names : dict of str to list of str
        ``variable -> feature columns`` the estimator expects.
    feature_set_version : int
        :data:`qcflag.features.FEATURE_SET_VERSION` at training time.
    scheme : str
        Flag scheme of the training labels.
    rules : str or None
        Rule set the features came from (built-in name or file path; None = standard).
    card : dict
        Model card (JSON-able): training data fingerprint and sizes, feature set version,
        scheme, rules and their digest, estimator, cross-validation metrics, fusion and
        calibration for the combiner (``card["fusion"][variable]``), package versions, date.
    """

    estimators: dict[str, Any]
    feature_names: dict[str, list[str]]
    feature_set_version: int = FEATURE_SET_VERSION
    scheme: str = "argo"
    rules: str | None = None
    card: dict[str, Any] = field(default_factory=dict)

    @property
    def variables(self) -> list[str]:
        """Variables the model grades."""
        return list(self.estimators)

    # ------------------------------------------------------------- prediction
    def _checks(self, batch: ProfileBatch, checks: CheckTable | None) -> CheckTable:
        if checks is not None:
            return checks
        from qcflag.rules import load_rules, run_checks

        rs = load_rules(self.rules)
        digest = self.card.get("rules_digest")
        if digest and rs.digest != digest:
            warnings.warn(
                f"rule set {self.rules or 'standard'!r} differs from the one this model was "
                "trained with; retrain for consistent features",
                UserWarning, stacklevel=3,
            )
        return run_checks(batch, rules=rs)

    def features(
        self, batch: ProfileBatch, checks: CheckTable | None = None
    ) -> dict[str, NDArray[np.float64]]:
        """Feature matrices in the model's column order, per variable.

        Raises
        ------
        QCFlagError
            If the feature set version differs or the checks lack features the model needs.
        """
        if self.feature_set_version != FEATURE_SET_VERSION:
            raise QCFlagError(
                f"model uses feature set {self.feature_set_version}, this qcflag builds "
                f"{FEATURE_SET_VERSION}; retrain the model with this version"
            )
        checks = self._checks(batch, checks)
        out = {}
        for var in self.variables:
            X, names = build_features(batch, checks, var)
            want = self.feature_names[var]
            if names != want:
                pos = {n: i for i, n in enumerate(names)}
                missing = [n for n in want if n not in pos]
                if missing:
                    raise QCFlagError(
                        f"{var}: features {missing[:4]} the model needs are not produced by "
                        f"these checks; run with the model's rules ({self.rules or 'standard'})"
                    )
                X = X[:, [pos[n] for n in want]]
            scales = (self.card.get("feature_quantisation") or {}).get(var)
            out[var] = X if scales is None else quantise(X, np.asarray(scales, dtype=float))
        return out

    def predict_proba(
        self, batch: ProfileBatch, checks: CheckTable | None = None
    ) -> dict[str, NDArray[np.float64]]:
        """Probabilities of grades 1-4 per level, per variable.

        Parameters
        ----------
        batch : ProfileBatch
            Profiles to grade.
        checks : CheckTable, optional
            Rule results on `batch`; run with the model's rules when not given.

        Returns
        -------
        dict of str to ndarray of shape (n_levels, 4)
            Columns are grades 1, 2, 3, 4; rows sum to 1.
        """
        feats = self.features(batch, checks)
        return {v: self.estimators[v].predict_proba(X) for v, X in feats.items()}

    def feature_contributions(
        self, X: NDArray[np.float64], variable: str
    ) -> tuple[list[str], NDArray[np.float64]]:
        """Cheap per-level attribution of each feature toward worse grades.

        Linear models: coefficient times the standardised feature value (the feature's share
        of the latent score). Boosted trees: path attributions (the change of the subtree
        mean log-odds at every split a level passes, credited to the split feature), summed
        over the thresholds. Positive values push toward probably bad / bad.

        Parameters
        ----------
        X : ndarray of shape (n_levels, n_features)
            Features in the model's column order (:meth:`features`).
        variable : str
            Which variable's estimator.

        Returns
        -------
        names : list of str
            Feature names (columns of the array).
        contributions : ndarray of shape (n_levels, n_features)
        """
        return list(self.feature_names[variable]), self.estimators[variable].contributions(X)

    def attribution(
        self, batch: ProfileBatch, checks: CheckTable | None = None,
        *, levels: NDArray[np.bool_] | None = None,
    ) -> dict[str, tuple[list[str], NDArray[np.float64]]]:
        """:meth:`feature_contributions` for every variable of a batch.

        Parameters
        ----------
        batch : ProfileBatch
        checks : CheckTable, optional
        levels : ndarray of bool, optional
            Compute only these levels (others are zero), e.g. the levels to be explained.
        """
        out = {}
        for var, X in self.features(batch, checks).items():
            names = list(self.feature_names[var])
            if levels is None:
                out[var] = (names, self.estimators[var].contributions(X))
            else:
                full = np.zeros_like(X)
                if levels.any():
                    full[levels] = self.estimators[var].contributions(X[levels])
                out[var] = (names, full)
        return out

    # ------------------------------------------------------------ persistence
    def _export(self) -> tuple[dict[str, Any], dict[str, dict[str, NDArray[Any]]]]:
        from qcflag._version import __version__
        from qcflag.learn.estimators import ESTIMATORS

        variables = {}
        arrays = {}
        for var, est in self.estimators.items():
            name = type(est).__name__
            if ESTIMATORS.get(name) is not type(est):
                raise QCFlagError(f"{var}: estimator {name} cannot be saved")
            state, arr = est._export()
            variables[var] = {"estimator": name, "feature_names": list(self.feature_names[var]),
                              "state": state, "arrays": []}
            arrays[var] = arr
        meta = {
            "qcflag_version": __version__,
            "feature_set_version": int(self.feature_set_version),
            "scheme": self.scheme,
            "rules": self.rules,
            "card": self.card,
            "variables": variables,
        }
        return meta, arrays

    @classmethod
    def _from_export(cls, meta: dict[str, Any], estimators: dict[str, Any]) -> QCModel:
        return cls(
            estimators=estimators,
            feature_names={v: list(s["feature_names"]) for v, s in meta["variables"].items()},
            feature_set_version=int(meta["feature_set_version"]),
            scheme=str(meta["scheme"]),
            rules=meta["rules"],
            card=dict(meta["card"]),
        )


def _cv_estimators(chosen: str, compare: bool, seed: int, rule_col: int) -> dict[str, Any]:
    names = list(ALL_MODELS) if compare else [chosen, *BASELINES]
    names = list(dict.fromkeys(names))
    return {n: make_estimator(n, seed=seed, rule_column=rule_col) for n in names}


CLASS_WEIGHTINGS: tuple[str, ...] = ("sqrt", "balanced", "none", "cv")
"""Values of ``train_model(class_weight=...)`` and ``qcflag train --class-weight``."""

_WEIGHT_PARAM: dict[str, str | None] = {"sqrt": "sqrt", "balanced": "balanced", "none": None}


def _choose_class_weight(
    est: Any, class_weight: str, X: NDArray[np.float64], y: NDArray[np.int64],
    groups: NDArray[Any], **cv: Any,
) -> tuple[str, dict[str, float]]:
    """Choose the weighting to fit `est` with; return it and the CV errors behind it.

    A fixed weighting is returned as it is (no scores); ``"cv"`` cross-validates a copy of
    `est` per weighting of :data:`_WEIGHT_PARAM` on the same folds and takes the lowest
    mean MAE over the folds, the first in that order on ties.
    """
    from sklearn.base import clone

    if class_weight != "cv":
        return class_weight, {}
    cands = {name: clone(est).set_params(class_weight=param)
             for name, param in _WEIGHT_PARAM.items()}
    rep = grouped_cross_validate(cands, X, y, groups, **cv)
    scores = {name: float(np.mean([f["mae"] for f in rep.folds["grade"][name]]))
              for name in cands}
    return min(scores, key=scores.__getitem__), scores


def train_model(
    batch: ProfileBatch,
    *,
    estimator: str = "boosted",
    folds: int = 5,
    seed: int = 0,
    rules: Any = None,
    holdout_cruises: Iterable[Any] | None = None,
    compare: bool = False,
    fusion: bool = True,
    estimator_params: dict[str, Any] | None = None,
    max_train_levels: int | None = 40_000,
    quantise_features: bool | None = None,
    class_weight: str | None = None,
) -> tuple[QCModel, CVReport]:
    """Learn graded flags from the manual flags of an archive.

    Parameters
    ----------
    batch : ProfileBatch
        Manually flagged profiles; ``profiles["cruise"]`` gives the groups.
    estimator : {"boosted", "boosted-oblivious", "logistic-at", "logistic-it", "nominal"}
        Model to fit (default "boosted").
    folds : int, default=5
        Cross-validation folds (whole cruises).
    seed : int, default=0
        Seed of the fold shuffling and the boosted model.
    rules : str, path or RuleSet, optional
        Rule set for the checks (default: the standard set); a path is recorded as given.
    holdout_cruises : iterable, optional
        Cruises kept out of cross-validation and of the final fit, scored once.
    compare : bool, default=False
        Cross-validate every model (:data:`ALL_MODELS`), not only the chosen one and the
        baselines.
    fusion : bool, default=True
        Fit the combiner's fusion/calibration on the out-of-fold probabilities.
    estimator_params : dict, optional
        Parameters set on the chosen estimator (and its cross-validated copy), e.g.
        ``{"max_iter": 50}``.
    max_train_levels : int or None, default=40_000
        Fit the learned models on at most this many levels per fit: every level of the
        rarer grades and a sample of the good ones, up-weighted to compensate
        (:func:`qcflag.learn.evaluation.majority_subsample`). Cross-validation still scores
        every level. None fits on all levels.
    quantise_features : bool, optional
        Snap the features to a fixed grid before fitting (:func:`quantise`; the scales go
        into the model card and prediction applies the same map). Default: on for the
        boosted model, whose training it speeds up several-fold, off otherwise.
    class_weight : {"sqrt", "balanced", "none", "cv"}, optional
        Weighting of the rarer grades in the chosen estimator: ``"sqrt"`` (the square root
        of the inverse grade frequency), ``"balanced"`` (the inverse frequency), ``"none"``,
        or ``"cv"``: per variable, the one of those three with the lowest mean absolute
        grade error in grouped cross-validation on the training cruises (ties go to the
        order sqrt, balanced, none; three extra cross-validations). The choice and the
        scores behind it go into the model card. Default: the estimator's own (sqrt).

    Returns
    -------
    model : QCModel
    report : CVReport
        Cross-validation (and hold-out) scores per variable and model.

    Raises
    ------
    QCFlagError
        If the batch has no manual flags, no graded levels, or fewer than two cruises.
    """
    from qcflag.rules import BUILTIN_RULE_SETS, load_rules, run_checks

    if estimator not in TRAINABLE:
        raise QCFlagError(
            f"unknown estimator {estimator!r}; choose {', '.join(TRAINABLE[:-1])} or "
            f"{TRAINABLE[-1]}"
        )
    missing = [v for v in JUDGED_VARIABLES if v not in batch.flags]
    if len(missing) == len(JUDGED_VARIABLES):
        raise QCFlagError(
            "the input carries no manual temperature or salinity flags to learn from; give "
            "files with temperature_flag/salinity_flag (or Argo <VAR>_QC) columns"
        )
    if class_weight is not None and class_weight not in CLASS_WEIGHTINGS:
        raise QCFlagError(
            f"unknown class weighting {class_weight!r}; choose {', '.join(CLASS_WEIGHTINGS)}")
    if class_weight is not None and estimator_params and "class_weight" in estimator_params:
        raise QCFlagError("give the class weighting once: as class_weight or in "
                          "estimator_params, not both")
    rs = load_rules(rules)
    checks = run_checks(batch, rules=rs)
    cruise = batch.per_level("cruise").astype(str)
    hold = None if holdout_cruises is None else [str(c) for c in holdout_cruises]
    estimators: dict[str, Any] = {}
    feature_names: dict[str, list[str]] = {}
    reports: dict[str, CVReport] = {}
    fusions: dict[str, Any] = {}
    label_counts: dict[str, dict[str, int]] = {}
    quant: dict[str, list[float]] = {}
    weighting: dict[str, str] = {}
    weighting_cv: dict[str, dict[str, float]] = {}
    for var in JUDGED_VARIABLES:
        if var not in batch.flags:
            continue
        y_all = labels_for(batch, var)
        keep = y_all > 0
        if not keep.any():
            continue
        X_all, names = build_features(batch, checks, var)
        if quantise_features if quantise_features is not None else estimator == "boosted":
            fit_rows = keep if hold is None else keep & ~np.isin(cruise, hold)
            scales = quantisation_scales(X_all[fit_rows])
            X_all = quantise(X_all, scales)
            quant[var] = [float(v) for v in scales]
        rule_col = names.index("rule_grade")
        cv_models = _cv_estimators(estimator, compare, seed, rule_col)
        if estimator_params:
            cv_models[estimator].set_params(**estimator_params)
        idx = np.flatnonzero(keep)
        if class_weight is not None:
            fit_idx = idx if hold is None else idx[~np.isin(cruise[idx], hold)]
            chosen, scores = _choose_class_weight(  # held-out cruises play no part
                cv_models[estimator], class_weight, X_all[fit_idx], y_all[fit_idx],
                cruise[fit_idx], folds=folds, seed=seed, max_train_levels=max_train_levels)
            cv_models[estimator].set_params(class_weight=_WEIGHT_PARAM[chosen])
            if scores:
                weighting_cv[var] = scores
        param = cv_models[estimator].get_params().get("class_weight", "-")
        weighting[var] = next((k for k, v in _WEIGHT_PARAM.items() if v == param), "custom")
        rep = grouped_cross_validate(
            cv_models, X_all[idx], y_all[idx], cruise[idx], folds=folds, seed=seed,
            holdout=hold, variable=var, oof_models=[estimator],
            max_train_levels=max_train_levels,
        )
        reports[var] = rep
        train = keep if hold is None else keep & ~np.isin(cruise, hold)
        final = fit_subsampled(cv_models[estimator], X_all[train], y_all[train],
                               cruise[train], max_train_levels, seed)
        estimators[var] = final
        feature_names[var] = names
        label_counts[var] = {str(g): int(np.sum(y_all[train] == g)) for g in GRADES}
        if fusion:
            from qcflag.combine import fit_fusion

            oof = np.full((batch.n_levels, 4), np.nan)
            oof[idx] = rep.oof[var][estimator]
            y_fit = np.where(np.isfinite(oof).all(axis=1), y_all, 0)
            fusions[var] = fit_fusion(y_fit, oof, checks, var, seed=seed).to_dict()
    if not estimators:
        raise QCFlagError(
            "no level carries a good/probably good/probably bad/bad manual flag; nothing to "
            "learn from"
        )
    report = CVReport.merge(reports)
    train_profiles = batch.profiles
    if hold is not None:
        train_profiles = batch.profiles[~batch.profiles["cruise"].astype(str).isin(hold)]
    card = {
        "created_utc": _dt.datetime.now(_dt.UTC).strftime("%Y-%m-%dT%H:%M:%SZ"),
        "estimator": estimator,
        "max_train_levels": max_train_levels,
        "feature_set_version": FEATURE_SET_VERSION,
        "scheme": batch.scheme,
        "rules": rs.name,
        "rules_digest": rs.digest,
        "training_data": {
            "fingerprint": data_fingerprint(batch),
            "n_cruises": int(train_profiles["cruise"].nunique()),
            "n_profiles": len(train_profiles),
            "n_levels": int(batch.counts[train_profiles.index.to_numpy()].sum()),
            "labelled_levels_by_grade": label_counts,
            "holdout_cruises": hold or [],
            "sources": [str(s) for s in batch.attrs.get("sources", [])][:100],
        },
        "cv": report.to_dict()["summary"],
        "holdout": report.to_dict()["holdout"],
        "packages": _versions(),
        "caution": CAUTION,
    }
    if weighting:
        card["class_weight"] = weighting
    if weighting_cv:
        card["class_weight_cv_mae"] = weighting_cv
    if quant:
        card["feature_quantisation"] = quant
    if fusions:
        card["fusion"] = fusions
    rules_id: str | None
    if rules is None or (isinstance(rules, str) and rules in BUILTIN_RULE_SETS):
        rules_id = rules
    elif isinstance(rules, (str, os.PathLike)):
        rules_id = str(Path(rules).resolve())
    else:  # a RuleSet object
        rules_id = str(rs.path.resolve()) if rs.path is not None else rs.name
    model = QCModel(
        estimators=estimators,
        feature_names=feature_names,
        feature_set_version=FEATURE_SET_VERSION,
        scheme=batch.scheme,
        rules=rules_id,
        card=card,
    )
    return model, report


def evaluate_model(model: QCModel, batch: ProfileBatch, *, false_alarm: float = 0.01
                   ) -> dict[str, Any]:
    """Score a model's own grades against the manual flags of a batch.

    Parameters
    ----------
    model : QCModel
        A trained model.
    batch : ProfileBatch
        Manually flagged profiles (ideally cruises the model never saw).
    false_alarm : float, default=0.01
        Rate for ``recall_at_far``.

    Returns
    -------
    dict
        JSON-able: ``data_fingerprint``, ``n_levels``, ``note``, and ``variables`` mapping
        ``"temperature"``/``"salinity"`` to :func:`qcflag.learn.metrics.score_grades` output
        (``qwk``, ``mae``, ``recall_bad``, ``false_alarm_rate``, ``confusion``, ...).

    Raises
    ------
    QCFlagError
        If the batch has no graded manual flags for any variable the model grades.
    """
    from qcflag.learn.evaluation import _jsonable
    from qcflag.learn.metrics import score_grades

    proba = model.predict_proba(batch)
    fp = data_fingerprint(batch)
    out: dict[str, Any] = {"data_fingerprint": fp, "n_levels": batch.n_levels,
                           "variables": {}}
    if fp == model.card.get("training_data", {}).get("fingerprint"):
        out["note"] = ("these are the model's training data: scores are optimistic; "
                       "see the cross-validation scores in the model card")
    else:
        out["note"] = "automated flags assist expert QC and do not replace it"
    for var, p in proba.items():
        if var not in batch.flags:
            continue
        y = labels_for(batch, var)
        keep = y > 0
        if not keep.any():
            continue
        est = model.estimators[var]
        cls = np.asarray(est.classes_)
        if getattr(est, "_ordinal", True):
            cum = np.cumsum(p[keep], axis=1)
            pred = cls[np.minimum((cum < 0.5 - 1e-12).sum(axis=1), cls.size - 1)]
        else:
            pred = cls[np.argmax(p[keep], axis=1)]
        out["variables"][var] = score_grades(y[keep], p[keep], pred, false_alarm=false_alarm)
    if not out["variables"]:
        raise QCFlagError(
            "the input carries no good/probably good/probably bad/bad manual flags to score "
            "against; give manually flagged files"
        )
    return _jsonable(out)
