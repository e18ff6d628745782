"""Commands ``qcflag train``, ``qcflag evaluate`` and ``qcflag runs`` over :mod:`qcflag.learn`."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated

import typer

from qcflag.cli._app import app, guard

_Inputs = Annotated[
    list[Path],
    typer.Argument(help="Manually flagged profile files (CSV or NetCDF); never modified.",
                   dir_okay=False),
]
_ESTIMATORS = ("boosted", "boosted-oblivious", "logistic-at", "logistic-it", "nominal")


@app.command("train", rich_help_panel="Learning")
@guard
def train_cmd(
    inputs: _Inputs,
    model: Annotated[Path, typer.Option(help="Model file to write (e.g. archive.qcm).",
                                        dir_okay=False)],
    estimator: Annotated[str, typer.Option(
        help="boosted (cumulative gradient boosting), boosted-oblivious (the same over "
             "oblivious trees, faster prediction), logistic-at, logistic-it (ordinal "
             "logistic) or nominal (multinomial, ignores the order).")] = "boosted",
    folds: Annotated[int, typer.Option(help="Cross-validation folds (whole cruises).",
                                       min=2)] = 5,
    rules: Annotated[str | None, typer.Option(
        help="Rule set: a shipped name (e.g. 'standard') or a TOML file.")] = None,
    seed: Annotated[int, typer.Option(help="Seed of fold shuffling and boosting.",
                                      min=0)] = 0,
    holdout: Annotated[list[str] | None, typer.Option(
        help="Cruise kept out of training and scored once (repeatable).")] = None,
    compare: Annotated[bool, typer.Option(
        "--compare", help="Cross-validate every model, not only the chosen one and the "
                          "baselines.")] = False,
    class_weight: Annotated[str, typer.Option(
        help="Weighting of the rare grades: sqrt (square root of the inverse grade "
             "frequency), balanced (inverse frequency), none, or cv (per variable, the one "
             "of these with the lowest cross-validated mean absolute grade error; about "
             "four times the cross-validation time).")] = "sqrt",
    scheme: Annotated[str | None, typer.Option(
        help="Flag scale of the manual flags (default: detected or argo).")] = None,
    overwrite: Annotated[bool, typer.Option("--overwrite",
                                            help="Replace an existing model file.")] = False,
) -> None:
    """Learn graded flags from the manual flags in INPUTS and write a model file.

    Levels are grouped by the cruise found in the data; cross-validation never splits a
    cruise. Prints the cross-validation table of the chosen model beside the baselines and
    logs the run in runs.sqlite beside the model. Automated flags assist expert QC and do
    not replace it.
    """
    if estimator not in _ESTIMATORS:
        raise typer.BadParameter(f"choose one of {', '.join(_ESTIMATORS)}",
                                 param_hint="--estimator")
    from qcflag.learn.model import CLASS_WEIGHTINGS

    if class_weight not in CLASS_WEIGHTINGS:
        raise typer.BadParameter(f"choose one of {', '.join(CLASS_WEIGHTINGS)}",
                                 param_hint="--class-weight")
    from qcflag.io import check_writable, read_files
    from qcflag.learn import log_run, runs_db_for, save_model, train_model

    check_writable(model, overwrite=overwrite)  # fail before the long part
    batch = read_files(inputs, scheme=scheme)
    fitted, report = train_model(
        batch, estimator=estimator, folds=folds, seed=seed, rules=rules,
        holdout_cruises=holdout, compare=compare, class_weight=class_weight,
    )
    save_model(fitted, model, overwrite=overwrite)
    summary = report.summary()
    metrics = {
        var: {k: per[estimator][k]["mean"] for k in
              ("mae", "qwk", "recall_bad", "false_alarm_rate", "roc_auc")}
        for var, per in summary.items()
    }
    log_run(runs_db_for(model), command="train", model_path=model, metrics=metrics,
            data_fingerprint=fitted.card["training_data"]["fingerprint"],
            n_levels=batch.n_levels,
            note=f"estimator={estimator} folds={folds} class_weight={class_weight}")
    typer.echo(report.to_text())
    weights = fitted.card.get("class_weight", {})
    for var, scores in fitted.card.get("class_weight_cv_mae", {}).items():
        tried = ", ".join(f"{k} {v:.4f}" for k, v in scores.items())
        typer.echo(f"class weighting, {var}: {weights[var]} (cross-validated MAE: {tried})")
    typer.echo(f"\nmodel written to {model} (runs log: {runs_db_for(model)})")


@app.command("evaluate", rich_help_panel="Learning")
@guard
def evaluate_cmd(
    inputs: _Inputs,
    model: Annotated[Path, typer.Option(help="Model file to score.", dir_okay=False)],
    json_out: Annotated[Path | None, typer.Option(
        "--json", help="Also write the scores to this JSON file.", dir_okay=False)] = None,
    scheme: Annotated[str | None, typer.Option(
        help="Flag scale of the manual flags (default: detected or argo).")] = None,
    overwrite: Annotated[bool, typer.Option("--overwrite",
                                            help="Replace an existing JSON file.")] = False,
) -> None:
    """Score a model against the manual flags in INPUTS (ideally cruises it never saw).

    Prints JSON with, per variable, qwk, mae, recall_bad, false_alarm_rate, confusion (rows
    manual grade 1-4, columns model grade) and more; logs the run in runs.sqlite.
    """
    import json

    from qcflag.io import atomic_output, check_writable, read_files
    from qcflag.learn import load_model, log_run, runs_db_for
    from qcflag.learn.model import evaluate_model

    if json_out is not None:
        check_writable(json_out, overwrite=overwrite)
    fitted = load_model(model)
    batch = read_files(inputs, scheme=scheme)
    scores = evaluate_model(fitted, batch)
    text = json.dumps(scores, indent=1, allow_nan=False)
    if json_out is not None:
        with atomic_output(json_out, overwrite=overwrite) as tmp:
            tmp.write_text(text + "\n", encoding="utf-8")
    log_run(runs_db_for(model), command="evaluate", model_path=model,
            metrics={v: {k: s[k] for k in ("mae", "qwk", "recall_bad", "false_alarm_rate")}
                     for v, s in scores["variables"].items()},
            data_fingerprint=scores["data_fingerprint"], n_levels=batch.n_levels)
    typer.echo(text)


@app.command("runs", rich_help_panel="Learning")
@guard
def runs_cmd(
    model: Annotated[Path | None, typer.Option(
        help="List the runs of this model (from runs.sqlite beside it).",
        dir_okay=False)] = None,
    db: Annotated[Path | None, typer.Option(help="Runs database to list (all models).",
                                            dir_okay=False)] = None,
) -> None:
    """List logged train and evaluate runs (UTC time, command, model, data, scores)."""
    from qcflag.exceptions import QCFlagError
    from qcflag.learn import list_runs, runs_db_for

    if model is None and db is None:
        db = Path.cwd() / "runs.sqlite"
    if model is not None and db is None:
        db = runs_db_for(model)
    assert db is not None
    runs = list_runs(db, model_path=model)
    if runs.empty:
        raise QCFlagError(f"{db}: no runs logged{' for ' + str(model) if model else ''}")
    for _, r in runs.iterrows():
        scores = "; ".join(
            f"{var}: " + " ".join(
                f"{k}={v:.3f}" for k, v in m.items() if isinstance(v, (int, float))
            )
            for var, m in r["metrics"].items() if isinstance(m, dict)
        )
        typer.echo(
            f"{r['id']:>4}  {r['time_utc']}  {r['command']:<8}  {r['model_path']}  "
            f"data={str(r['data_fingerprint'])[:12]}  levels={r['n_levels']}  {scores}"
        )
