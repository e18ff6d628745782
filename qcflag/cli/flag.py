"""Commands ``qcflag flag`` and ``qcflag audit``: thin calls into the library."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated

import typer

from qcflag.cli._app import app, guard

_Inputs = Annotated[
    list[Path],
    typer.Argument(help="Profile files (CSV or NetCDF); never modified.", dir_okay=False),
]


@app.command("flag", rich_help_panel="Processing")
@guard
def flag_cmd(
    inputs: _Inputs,
    out: Annotated[Path, typer.Option("--out", "-o",
                                      help="Output file (one input) or directory.")],
    model: Annotated[Path | None, typer.Option(
        help="Fitted model file; without it the flags come from the rules alone.",
        dir_okay=False)] = None,
    rules: Annotated[str | None, typer.Option(
        help="Rule set: a shipped name (e.g. 'standard') or a TOML file.")] = None,
    scheme: Annotated[str, typer.Option(help="Output flag scheme.")] = "argo",
    caution: Annotated[float, typer.Option(
        help="Move flags towards higher grades (0 = minimum expected cost).", min=0.0)] = 0.0,
    target_recall: Annotated[float | None, typer.Option(
        help="Flag probably bad so that this share of bad levels is caught (model runs).",
        min=0.0, max=1.0)] = None,
    review_budget: Annotated[float | None, typer.Option(
        help="Share of levels a person will review; flag the most suspicious (model runs).",
        min=0.0, max=1.0)] = None,
    false_alarm_rate: Annotated[float | None, typer.Option(
        help="Flag probably bad so that about this share of good levels is flagged, and as "
             "many bad ones as the model ranks above them (model runs).",
        min=0.0, max=1.0)] = None,
    probabilities: Annotated[bool, typer.Option(
        "--probabilities", help="Also write the grade probabilities.")] = False,
    overwrite: Annotated[bool, typer.Option(
        "--overwrite", help="Replace existing outputs.")] = False,
    workers: Annotated[int | None, typer.Option(
        help="Flag files in parallel on this many dask worker processes (a LocalCluster).",
        min=1)] = None,
    scheduler: Annotated[str | None, typer.Option(
        help="Address of an existing dask scheduler (tcp://host:port) to run on.")] = None,
    join_cruises: Annotated[bool, typer.Option(
        "--join-cruises",
        help="Flag files that share a cruise together (e.g. one file per float profile), so "
             "the track check and the cruise comparisons see the whole cruise; each file "
             "still gets its own output.")] = False,
) -> None:
    """Flag every level of INPUTS and write them with automatic flag columns added.

    Adds <var>_flag_auto, <var>_flag_auto_confidence and <var>_flag_auto_reasons for
    temperature and salinity (and pressure where checked). Automated flags assist expert
    QC and do not replace it.
    """
    if workers is not None or scheduler is not None or join_cruises:
        from qcflag.scale import flag_files_parallel  # lazy: dask only when asked for

        summary = flag_files_parallel(
            inputs, out, workers=workers or 1, scheduler=scheduler, model=model, rules=rules,
            scheme=scheme, overwrite=overwrite, caution=caution, target_recall=target_recall,
            review_budget=review_budget, false_alarm_rate=false_alarm_rate,
            probabilities=probabilities, join_cruises=join_cruises,
        )
        typer.echo(summary.to_json())
        return
    from qcflag.pipeline import flag_files

    summary = flag_files(
        inputs, out, model=model, rules=rules, scheme=scheme, overwrite=overwrite,
        caution=caution, target_recall=target_recall, review_budget=review_budget,
        false_alarm_rate=false_alarm_rate, probabilities=probabilities,
    )
    typer.echo(summary.to_json())


@app.command("audit", rich_help_panel="Processing")
@guard
def audit_cmd(
    inputs: _Inputs,
    model: Annotated[Path, typer.Option(help="Fitted model file (trained on other cruises).",
                                        dir_okay=False)],
    out: Annotated[Path, typer.Option("--out", "-o", help="CSV of disagreeing levels.")],
    queue: Annotated[Path | None, typer.Option(
        help="CSV of profiles ranked for review.")] = None,
    summary: Annotated[Path | None, typer.Option(
        help="CSV of disagreement per cruise and operator.")] = None,
    rules: Annotated[str | None, typer.Option(
        help="Rule set: a shipped name or a TOML file.")] = None,
    overwrite: Annotated[bool, typer.Option(
        "--overwrite", help="Replace existing outputs.")] = False,
) -> None:
    """List levels where automatic and manual flags disagree, most suspicious first."""
    import json

    from qcflag.audit import audit_files

    info = audit_files(inputs, out, model=model, rules=rules, queue=queue, summary=summary,
                       overwrite=overwrite)
    typer.echo(json.dumps(info, indent=2))
