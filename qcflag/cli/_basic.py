"""Small commands: version and show-versions."""

from __future__ import annotations

from typing import Annotated

import typer

from qcflag._version import __version__
from qcflag.cli._app import app


def _version_callback(value: bool) -> None:
    if value:
        typer.echo(f"qcflag {__version__}")
        raise typer.Exit()


@app.callback()
def _root(
    version: Annotated[
        bool,
        typer.Option("--version", callback=_version_callback, is_eager=True,
                     help="Print the version and exit."),
    ] = False,
) -> None:
    """Graded quality-control flags for hydrographic profiles.

    Automated flags assist expert QC and do not replace it; the data programme's own
    standards prevail.
    """


@app.command("show-versions")
def show_versions_cmd() -> None:
    """Print qcflag's and its dependencies' versions (paste into bug reports)."""
    from qcflag import show_versions

    for k, v in show_versions().items():
        typer.echo(f"{k:>14}: {v}")
