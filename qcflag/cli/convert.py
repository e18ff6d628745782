"""``qcflag convert``: canonical CSV <-> CF NetCDF, lossless for values and flags."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated

import typer

from qcflag.cli._app import app, guard


@app.command("convert")
@guard
def convert_cmd(
    source: Annotated[str, typer.Argument(help="Input file, folder or glob (CSV or NetCDF).")],
    output: Annotated[Path, typer.Argument(help="Output file: .csv or .nc.")],
    scheme: Annotated[str | None, typer.Option(help="Flag scale of the manual flags.")] = None,
    columns: Annotated[str | None, typer.Option(
        help="CSV column names as canonical=actual,... (e.g. temperature=T68).")] = None,
    overwrite: Annotated[bool, typer.Option(help="Replace OUTPUT if it exists.")] = False,
) -> None:
    """Convert profiles between canonical CSV and CF contiguous-ragged NetCDF."""
    from qcflag.cli.inspect import parse_columns
    from qcflag.io import check_writable, read_files, write

    check_writable(output, overwrite=overwrite)
    batch = read_files(source, scheme=scheme, columns=parse_columns(columns), progress=True)
    cmd = f"qcflag convert {source} {output}" + (f" --scheme {scheme}" if scheme else "")
    write(batch, output, overwrite=overwrite, history=cmd)
    typer.echo(f"wrote {output}: {batch.n_profiles} profiles, {batch.n_levels} levels")
