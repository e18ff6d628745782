"""The one place the whole chain is wired: checks -> model -> combiner -> output columns.

:func:`flag_batch` is a pure function of its inputs and treats every profile on its own, so
flagging subsets of profiles and concatenating the results gives the same flags as
flagging the whole batch (the dask and xarray layers rely on this). :func:`flag_files`
streams files one at a time: read, flag, write atomically, next.

Automated flags assist expert quality control; they do not replace it, and the data
programme's own standards prevail.
"""

from __future__ import annotations

import json
import os
import sys
import warnings
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd

from qcflag.combine import (
    COSTLY_SHARE,
    DecisionError,
    DecisionWarning,
    FusionParams,
    combine,
    explain,
)
from qcflag.exceptions import QCFlagError
from qcflag.result import FlagResult, VariableFlags
from qcflag.schemes import get_scheme, profile_quality

if TYPE_CHECKING:
    from numpy.typing import NDArray

    from qcflag.checks.base import CheckTable
    from qcflag.io.common import AddedColumn
    from qcflag.profiles import ProfileBatch

__all__ = [
    "FLAGGED_VARIABLES",
    "FlagSummary",
    "flag_batch",
    "flag_files",
    "flagged_columns",
    "profile_grades",
]

FLAGGED_VARIABLES: tuple[str, ...] = ("temperature", "salinity")
"""Variables always flagged; pressure is flagged too wherever a check judged it."""

CAUTION_NOTE = (
    "Automated flags assist expert quality control and do not replace it; the data "
    "programme's own standards prevail."
)


# ---------------------------------------------------------------------------- helpers
def _fusion_for(model: Any, variable: str) -> FusionParams | None:
    """Return the fitted fusion of `variable` stored with a model (attribute or model card)."""
    store = getattr(model, "fusion", None)
    if store is None:
        card = getattr(model, "card", None) or {}
        store = card.get("fusion") if isinstance(card, Mapping) else None
    if not store or variable not in store:
        return None
    entry = store[variable]
    return entry if isinstance(entry, FusionParams) else FusionParams.from_dict(entry)


def _predict(
    model: Any, batch: ProfileBatch, checks: CheckTable
) -> tuple[dict[str, Any], dict[str, Any]]:
    """Model probabilities per variable, and the feature matrices when the model shows them.

    Models with ``features`` / ``feature_contributions`` (:class:`qcflag.learn.QCModel`)
    build the features once, for both the probabilities and the reasons; any other object
    with ``predict_proba(batch, checks=...)`` works too, without feature reasons.
    """
    feats_fn = getattr(model, "features", None)
    ests = getattr(model, "estimators", None)
    if callable(feats_fn) and isinstance(ests, Mapping) and hasattr(
            model, "feature_contributions"):
        feats = feats_fn(batch, checks)
        return {v: ests[v].predict_proba(X) for v, X in feats.items()}, feats
    return dict(model.predict_proba(batch, checks=checks)), {}


def _explain(
    model: Any, checks: CheckTable, variable: str, vf: VariableFlags, X: Any
) -> VariableFlags:
    """Name the features behind the levels the model flagged (attribution only there)."""
    need = (vf.grade >= 3) & ~vf.forced
    if not need.any():
        return vf
    names, contrib = model.feature_contributions(X[need], variable)
    full = np.zeros((vf.grade.size, len(names)))
    full[need] = contrib
    return explain(vf, checks, variable, (names, full))


def _decision_threshold(
    fusion: FusionParams | None,
    variable: str,
    target_recall: float | None,
    review_budget: float | None,
    false_alarm_rate: float | None = None,
) -> float | None:
    if target_recall is None and review_budget is None and false_alarm_rate is None:
        return None
    if fusion is None:
        raise DecisionError(
            f"{variable}: the model carries no calibration data, so a target recall or "
            "review budget cannot be met; refit the model or use --caution"
        )
    if target_recall is not None:
        threshold = fusion.threshold_for_recall(target_recall)
        share = fusion.flagged_share(threshold)
        if share > COSTLY_SHARE:
            warnings.warn(DecisionWarning(
                f"{variable}: a target recall of {target_recall:g} needs P(probably bad or "
                f"bad) >= {threshold:.3g}, which flagged {share:.0%} of the training levels "
                "out of fold (some manually flagged levels look good to the model); review "
                "the flags, or use a lower target or --caution"), stacklevel=3)
        return threshold
    if false_alarm_rate is not None:
        return fusion.threshold_for_false_alarms(false_alarm_rate)
    assert review_budget is not None
    return fusion.threshold_for_budget(review_budget)


def profile_grades(
    variables: Mapping[str, VariableFlags], offsets: NDArray[np.int64],
    profile_ids: Sequence[Any] | None = None,
) -> pd.DataFrame:
    """Profile-level grade per variable from the share of good levels.

    Uses :func:`qcflag.schemes.profile_quality` (Argo reference table 2a): ``N`` = good
    levels / (good + bad levels) in percent, letters A (100 %) to F (0 %).

    Parameters
    ----------
    variables : mapping of str to VariableFlags
        Level flags of each variable.
    offsets : ndarray of int, shape (n_profiles + 1,)
        Profile offsets of the batch.
    profile_ids : sequence, optional
        Written as column ``profile_id``.

    Returns
    -------
    pandas.DataFrame
        ``<var>_percent_good`` and ``<var>_profile_grade`` per variable, one row per profile.
    """
    data: dict[str, Any] = {}
    if profile_ids is not None:
        data["profile_id"] = list(profile_ids)
    for var, vf in variables.items():
        pct, letter = profile_quality(vf.grade, vf.state, offsets)
        data[f"{var}_percent_good"] = pct
        data[f"{var}_profile_grade"] = letter
    return pd.DataFrame(data, index=pd.RangeIndex(len(offsets) - 1))


# ------------------------------------------------------------------------ flag_batch
def flag_batch(
    batch: ProfileBatch,
    *,
    model: Any = None,
    rules: Any = None,
    caution: float = 0.0,
    target_recall: float | None = None,
    review_budget: float | None = None,
    false_alarm_rate: float | None = None,
    scheme: str = "argo",
) -> FlagResult:
    """Flag every level of a batch.

    Parameters
    ----------
    batch : ProfileBatch
        The profiles (not modified).
    model : QCModel, optional
        Fitted model (``predict_proba(batch, checks=...)``); None gives rules-only flags:
        the worst rule verdict, confidence 1 where forced and the heuristic
        :func:`qcflag.combine.rules_confidence` elsewhere.
    rules : str, path or rule set, optional
        Rule set for :func:`qcflag.rules.run_checks` (default: the standard set).
    caution : float, default=0.0
        Moves the decision towards higher grades (model runs only).
    target_recall : float, optional
        Flag probably bad or bad where the calibrated ``P(grade >= 3)`` reaches the
        threshold that gave this recall on the model's cross-validation folds.
    review_budget : float, optional
        Flag probably bad or bad the share of levels whose ``P(grade >= 3)`` is in the top
        `review_budget` on the model's cross-validation folds (a fixed threshold, so each
        profile is still flagged on its own).
    false_alarm_rate : float, optional
        Flag probably bad or bad where ``P(grade >= 3)`` exceeds what this share of the
        levels the operators passed reached on the model's cross-validation folds: about
        this share of good levels gets flagged, and as many bad ones as the model can rank
        above them.
    scheme : str, default="argo"
        Output flag scheme (recorded in the result).

    Returns
    -------
    FlagResult

    Raises
    ------
    DecisionError
        If more than one of `caution`, `target_recall`, `review_budget`,
        `false_alarm_rate` is set, or a threshold is asked for without a calibrated model.
    """
    from qcflag.rules import run_checks

    get_scheme(scheme)  # validates the name
    thresholds = [target_recall, review_budget, false_alarm_rate]
    n_set = sum([bool(caution), *(t is not None for t in thresholds)])
    if n_set > 1:
        raise DecisionError("give only one of --caution, --target-recall, --review-budget and "
                            "--false-alarm-rate")
    if model is None and any(t is not None for t in thresholds):
        raise DecisionError("--target-recall, --review-budget and --false-alarm-rate need a "
                            "model; pass --model")
    checks = run_checks(batch, rules=rules)
    variables = list(FLAGGED_VARIABLES)
    if checks.checks_for("pressure"):
        variables.append("pressure")
    proba: dict[str, Any] = {}
    features: dict[str, Any] = {}
    card: dict[str, object] = {}
    if model is not None:
        proba, features = _predict(model, batch, checks)
        card = dict(getattr(model, "card", {}) or {})
    out: dict[str, VariableFlags] = {}
    for var in variables:
        p = proba.get(var)
        fusion = _fusion_for(model, var) if p is not None else None
        threshold = None
        if p is not None:
            threshold = _decision_threshold(fusion, var, target_recall, review_budget,
                                            false_alarm_rate)
        vf = combine(
            checks, var, p,
            caution=caution if p is not None else 0.0,
            threshold=threshold,
            fusion=fusion,
            values=batch.values(var),
        )
        if var in features:
            vf = _explain(model, checks, var, vf, features[var])
        out[var] = vf
    profiles = profile_grades(out, batch.offsets, batch.profiles["profile_id"].tolist())
    return FlagResult(variables=out, checks=checks, profiles=profiles, scheme=scheme,
                      model_card=card)


# -------------------------------------------------------------------- output columns
def flagged_columns(
    batch: ProfileBatch,
    result: FlagResult,
    *,
    scheme: str = "argo",
    probabilities: bool = False,
) -> dict[str, AddedColumn]:
    """Build the columns/variables a writer adds for `result`.

    For each flagged variable ``v``: ``v_flag_auto`` (codes of `scheme`, CF
    ``flag_values``/``flag_meanings``, ``standard_name = "aggregate_quality_flag"``),
    ``v_flag_auto_confidence`` and ``v_flag_auto_reasons``; with `probabilities`,
    ``v_proba_1`` ... ``v_proba_4`` where a model gave them. Each is linked to ``v``
    (written into its ``ancillary_variables`` by the NetCDF writer).

    Parameters
    ----------
    batch : ProfileBatch
        The batch that was flagged.
    result : FlagResult
        Its flags.
    scheme : str, default="argo"
        Output flag scheme.
    probabilities : bool, default=False
        Add the fused grade probabilities.

    Returns
    -------
    dict of str to AddedColumn
        In writing order.
    """
    from qcflag.io import AddedColumn

    sch = get_scheme(scheme)
    taken = set(batch.extra.columns) if batch.extra is not None else set()
    cols: dict[str, AddedColumn] = {}
    for var, vf in result.variables.items():
        if vf.grade.shape != (batch.n_levels,):
            raise QCFlagError(f"{var}: flags do not match the batch; flag this batch again")
        codes = vf.codes(sch.name)
        cols[f"{var}_flag_auto"] = AddedColumn(
            codes,
            {
                "standard_name": "aggregate_quality_flag",
                "long_name": f"{var} automatic quality flag",
                "flag_values": sch.values,
                "flag_meanings": " ".join(sch.meanings),
                "conventions": sch.title,
                "coverage_content_type": "qualityInformation",
                "comment": CAUTION_NOTE,
            },
            var,
        )
        cols[f"{var}_flag_auto_confidence"] = AddedColumn(
            vf.confidence,
            {
                "long_name": f"probability of the {var} automatic flag's grade",
                "units": "1",
                "valid_min": 0.0,
                "valid_max": 1.0,
                "coverage_content_type": "qualityInformation",
                "comment": "1 where a physically impossible value forced the flag; rules-only "
                           "runs give a heuristic, not a calibrated probability",
            },
            var,
        )
        cols[f"{var}_flag_auto_reasons"] = AddedColumn(
            vf.reasons,
            {
                "long_name": f"checks that fired and model features behind the {var} flag",
                "comment": "';'-separated check names; model:<feature> names a model feature",
                "coverage_content_type": "qualityInformation",
            },
            var,
        )
        if probabilities and vf.proba is not None:
            for g in range(4):
                cols[f"{var}_proba_{g + 1}"] = AddedColumn(
                    vf.proba[:, g],
                    {
                        "long_name": f"probability that the {var} grade is {g + 1}",
                        "units": "1",
                        "comment": "grades 1 good, 2 probably good, 3 probably bad, 4 bad",
                        "coverage_content_type": "qualityInformation",
                    },
                    var,
                )
    clash = sorted(taken & set(cols))
    if clash:
        raise QCFlagError(
            f"{batch.attrs.get('sources', ['input'])[0]}: column {clash[0]!r} already exists "
            "(input flagged before?); flag the original file instead"
        )
    return cols


# ------------------------------------------------------------------------ flag_files
@dataclass
class FlagSummary:
    """What :func:`flag_files` did.

    Parameters
    ----------
    outputs : list of str
        Files written, in input order.
    n_profiles, n_levels : int
        Totals over all inputs.
    counts : dict
        ``variable -> {"1": n, ..., "4": n, "missing": n}`` over all inputs.
    rules_only : bool
        True when no model was used.
    """

    outputs: list[str] = field(default_factory=list)
    n_profiles: int = 0
    n_levels: int = 0
    counts: dict[str, dict[str, int]] = field(default_factory=dict)
    rules_only: bool = True

    def add(self, result: FlagResult, n_profiles: int, n_levels: int, output: Path) -> None:
        """Accumulate one file's result."""
        self.outputs.append(str(output))
        self.n_profiles += n_profiles
        self.n_levels += n_levels
        for var, vf in result.variables.items():
            c = self.counts.setdefault(var, {"1": 0, "2": 0, "3": 0, "4": 0, "missing": 0})
            bc = np.bincount(vf.grade.astype(np.int64), minlength=5)
            for g in range(1, 5):
                c[str(g)] += int(bc[g])
            c["missing"] += int(bc[0])

    def to_json(self) -> str:
        """JSON text of the summary."""
        return json.dumps(
            {"outputs": self.outputs, "n_profiles": self.n_profiles,
             "n_levels": self.n_levels, "rules_only": self.rules_only,
             "counts": self.counts},
            indent=2,
        )


def _history_line(command: str | None) -> str:
    from qcflag._version import __version__
    from qcflag.io.common import utc_timestamp

    now = utc_timestamp()  # honours SOURCE_DATE_EPOCH for reproducible outputs
    cmd = command if command is not None else " ".join(["qcflag", *sys.argv[1:]])
    return f"{now} qcflag {__version__}: {cmd}"


def output_paths(inputs: Sequence[Path], out: Path) -> list[Path]:
    """Where the flagged copies go.

    One input writes the file `out` (unless `out` is a directory); several inputs write
    files named like the inputs into the directory `out`.

    Parameters
    ----------
    inputs : sequence of Path
        Input files.
    out : Path
        Output file or directory.

    Returns
    -------
    list of Path

    Raises
    ------
    QCFlagError
        If several inputs share a name, or `out` is a file when a directory is needed.
    """
    if len(inputs) == 1 and not out.is_dir():
        return [out]
    names = [p.name for p in inputs]
    dup = {n for n in names if names.count(n) > 1}
    if dup:
        raise QCFlagError(
            f"{sorted(dup)[0]}: several inputs share this name, so their outputs in {out} "
            "would collide; flag them in separate runs"
        )
    if out.exists() and not out.is_dir():
        raise QCFlagError(f"{out}: several inputs need an output directory, not a file")
    return [out / n for n in names]


def plan_outputs(
    inputs: Sequence[str | os.PathLike[str]], out: str | os.PathLike[str], overwrite: bool
) -> list[tuple[Path, Path]]:
    """Pair inputs with outputs and refuse problems before any work starts.

    Parameters
    ----------
    inputs : sequence of path-like
        Input files (must exist).
    out : path-like
        Output file (one input) or directory (several; created).
    overwrite : bool
        Whether existing outputs may be replaced.

    Returns
    -------
    list of (input, output) Path pairs

    Raises
    ------
    QCFlagError
        No inputs, a missing input, colliding outputs, an output that would replace an input
        or an existing output without `overwrite`.
    """
    from qcflag.exceptions import InputFileError
    from qcflag.io.atomic import check_writable

    paths = [Path(p) for p in inputs]
    if not paths:
        raise InputFileError(None, "no input files given", "name at least one file")
    for p in paths:
        if not p.is_file():
            raise InputFileError(p, "no such input file", "check the path")
    out_path = Path(out)
    if len(paths) > 1:
        out_path.mkdir(parents=True, exist_ok=True)
    targets = output_paths(paths, out_path)
    resolved_in = {p.resolve() for p in paths}
    for t in targets:
        if t.resolve() in resolved_in:
            raise QCFlagError(f"{t}: output would replace an input; choose another --out")
        check_writable(t, overwrite=overwrite)
    return list(zip(paths, targets, strict=True))


def flag_files(
    inputs: Sequence[str | os.PathLike[str]],
    out: str | os.PathLike[str],
    *,
    model: Any = None,
    rules: Any = None,
    scheme: str = "argo",
    overwrite: bool = False,
    caution: float = 0.0,
    target_recall: float | None = None,
    review_budget: float | None = None,
    false_alarm_rate: float | None = None,
    probabilities: bool = False,
    progress: bool | Callable[[str], None] = False,
    command: str | None = None,
) -> FlagSummary:
    """Flag files one at a time and write each with the flag columns added.

    One input writes the file `out`; several inputs write one file each, named like the
    input, into the directory `out`. Every input column is kept; the output format follows
    the output's suffix (see :func:`qcflag.io.write`); a history line records the command.
    Outputs are written atomically and never replace an existing file unless `overwrite`.

    Parameters
    ----------
    inputs : sequence of path-like
        CSV or NetCDF profile files (never modified).
    out : path-like
        Output file (one input) or directory (several inputs).
    model : QCModel or path-like, optional
        Fitted model or its file; None gives rules-only flags.
    rules, scheme, caution, target_recall, review_budget, false_alarm_rate
        As in :func:`flag_batch`.
    overwrite : bool, default=False
        Replace existing outputs.
    probabilities : bool, default=False
        Also write the fused grade probabilities.
    progress : bool or callable, default=False
        Report each file written (True prints to stderr).
    command : str, optional
        Command recorded in the history line (default: this process's arguments).

    Returns
    -------
    FlagSummary

    Raises
    ------
    QCFlagError
        On unreadable input, an existing output without `overwrite`, an output that would
        replace an input, or invalid decision settings.
    """
    from qcflag.io import read_files, write

    pairs = plan_outputs(inputs, out, overwrite)
    if model is not None and isinstance(model, (str, os.PathLike)):
        from qcflag.learn import load_model

        model = load_model(model)
    report: Callable[[str], None] | None
    if progress is True:
        def report(msg: str) -> None:
            print(msg, file=sys.stderr)
    elif callable(progress):
        report = progress
    else:
        report = None
    from qcflag.rules import load_rules

    history = _history_line(command)
    summary = FlagSummary(rules_only=model is None)
    for src, dst in pairs:
        batch = read_files([src], scheme=None)
        rules = load_rules(rules)  # parsed once, for the first file, kept for the rest
        result = flag_batch(batch, model=model, rules=rules, caution=caution,
                            target_recall=target_recall, review_budget=review_budget,
                            false_alarm_rate=false_alarm_rate, scheme=scheme)
        added = flagged_columns(batch, result, scheme=scheme, probabilities=probabilities)
        write(batch, dst, added=added, overwrite=overwrite, history=history)
        summary.add(result, batch.n_profiles, batch.n_levels, dst)
        if report is not None:
            report(f"{src} -> {dst}: {batch.n_profiles} profiles, {batch.n_levels} levels")
        del batch, result, added
    return summary
