"""Command ``qcflag simulate``: write the invented demo programme with known truth."""

from __future__ import annotations

from enum import StrEnum
from pathlib import Path
from typing import Annotated

import typer

from qcflag.cli._app import app, guard


class _Format(StrEnum):
    csv = "csv"
    nc = "nc"
    both = "both"


@app.command("simulate", rich_help_panel="Data")
@guard
def simulate_cmd(
    out: Annotated[Path, typer.Option("--out", "-o", help="Output folder (created if needed).",
                                      file_okay=False)],
    cruises: Annotated[int, typer.Option(help="Number of cruises.", min=1, max=10000)] = 6,
    seed: Annotated[int, typer.Option(help="Random seed (same seed, same files).",
                                      min=0)] = 0,
    fmt: Annotated[_Format, typer.Option("--format", help="File format(s) to write.")] = (
        _Format.csv),
    overwrite: Annotated[bool, typer.Option("--overwrite",
                                            help="Replace existing files.")] = False,
) -> None:
    """Write a simulated survey archive with known truth: one file per cruise + scenario.json.

    The programme, vessels, stations, floats, operators and all values are invented (for
    the demo and tests); truth columns start with 'truth_'.
    """
    from qcflag.simulate import write_scenario

    formats = ("csv", "nc") if fmt is _Format.both else (fmt.value,)
    paths = write_scenario(out, n_cruises=cruises, seed=seed, formats=formats,
                           overwrite=overwrite)
    for p in paths:
        typer.echo(str(p))
    typer.echo(f"wrote {len(paths)} files (invented scenario, seed {seed})")
