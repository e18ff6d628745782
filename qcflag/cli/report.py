"""Commands ``qcflag report`` (per-cruise HTML reports) and ``qcflag demo`` (the whole job)."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated

import typer

from qcflag.cli._app import app, guard


@app.command("report", rich_help_panel="Processing")
@guard
def report_cmd(
    inputs: Annotated[list[Path], typer.Argument(
        help="Profile files (CSV or NetCDF) with their manual flags; never modified.",
        dir_okay=False)],
    out: Annotated[Path, typer.Option("--out", "-o", help="Report folder to create.",
                                      file_okay=False)],
    model: Annotated[Path | None, typer.Option(
        help="Fitted model file; without it the flags come from the rules alone.",
        dir_okay=False)] = None,
    rules: Annotated[str | None, typer.Option(
        help="Rule set: a shipped name (e.g. 'standard') or a TOML file.")] = None,
    scheme: Annotated[str, typer.Option(help="Output flag scheme.")] = "argo",
    overwrite: Annotated[bool, typer.Option(
        "--overwrite", help="Replace an existing report folder.")] = False,
) -> None:
    """Flag INPUTS, audit them against their manual flags and write per-cruise reports.

    Writes OUT/index.html, one self-contained page and one JSON summary per cruise. The
    pages open from disk in any browser. Automated flags assist expert QC and do not
    replace it; the data programme's standards prevail.
    """
    from qcflag.audit import audit
    from qcflag.io import read_files
    from qcflag.learn import load_model
    from qcflag.pipeline import flag_batch
    from qcflag.report import write_reports
    from qcflag.rules import load_rules

    if out.exists() and not overwrite:  # refuse before the (slow) flagging
        from qcflag.exceptions import OutputExistsError

        raise OutputExistsError(f"{out}: output exists; pass --overwrite to replace it")
    fitted = load_model(model) if model is not None else None
    rule_set = load_rules(rules if rules is not None else getattr(fitted, "rules", None))
    batch = read_files(inputs)
    result = flag_batch(batch, model=fitted, rules=rule_set, scheme=scheme)
    table = audit(batch, result) if batch.flags else None
    files = write_reports(batch, result, out_dir=out, audit_table=table,
                          model_card=fitted.card if fitted is not None else {},
                          rules=rule_set, overwrite=overwrite)
    n_cruises = (len(files) - 2) // 2
    typer.echo(f"wrote {n_cruises} cruise report(s); open {files[0].resolve()}")


@app.command("demo", rich_help_panel="Getting started")
@guard
def demo_cmd(
    out: Annotated[Path, typer.Option("--out", "-o", help="Folder to create.",
                                      file_okay=False)] = Path("qcflag-demo"),
    cruises: Annotated[int, typer.Option(
        help="Cruises to simulate; the last third are held out.", min=3, max=60)] = 12,
    seed: Annotated[int, typer.Option(help="Random seed (same seed, same demo).", min=0)] = 0,
    overwrite: Annotated[bool, typer.Option(
        "--overwrite", help="Replace an existing demo folder.")] = False,
) -> None:
    """Run the whole job on an invented archive and write reports to open in a browser.

    Simulates the cruises, trains on the first ones, evaluates and flags the held-out
    cruises, audits them against their manual flags and writes the per-cruise reports.
    The data are invented: the demo shows the workflow, not skill on a real archive.
    """
    from qcflag.demo import run_demo

    summary = run_demo(out, n_cruises=cruises, seed=seed, overwrite=overwrite, progress=True)
    typer.echo(str(summary.index_html.resolve()))
