"""``qcflag inspect``: what is in some profile files."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated

import typer

from qcflag.cli._app import app, guard
from qcflag.exceptions import QCFlagError


def parse_columns(text: str | None) -> dict[str, str] | None:
    """Parse ``canonical=actual,...`` into a mapping (None when not given)."""
    if not text:
        return None
    out: dict[str, str] = {}
    for part in text.split(","):
        if not part.strip():
            continue
        key, sep, value = part.partition("=")
        if not sep or not key.strip() or not value.strip():
            raise QCFlagError(f"--columns: {part!r} is not canonical=actual "
                              "(e.g. --columns temperature=T68,salinity=SAL)")
        out[key.strip()] = value.strip()
    return out


@app.command("inspect")
@guard
def inspect_cmd(
    files: Annotated[list[str], typer.Argument(help="Files, folders or glob patterns.")],
    scheme: Annotated[str | None, typer.Option(help="Flag scale of the manual flags.")] = None,
    columns: Annotated[str | None, typer.Option(
        help="CSV column names as canonical=actual,... (e.g. temperature=T68).")] = None,
    json: Annotated[bool, typer.Option("--json", help="Print JSON instead of text.")] = False,
) -> None:
    """Show profiles, levels, cruises, units, pressure range and manual flag counts."""
    import json as _json

    from qcflag.io import read_files
    from qcflag.io.summary import format_summary, summarize

    batch = read_files([Path(f) if not any(c in f for c in "*?[") else f for f in files],
                       scheme=scheme, columns=parse_columns(columns), progress=True)
    info = summarize(batch)
    typer.echo(_json.dumps(info, indent=2) if json else format_summary(info))
