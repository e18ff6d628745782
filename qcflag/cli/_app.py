"""The typer application object and the guard that turns user errors into one line."""

from __future__ import annotations

import functools
import sys
import warnings
from collections.abc import Callable
from typing import Any, TypeVar

import typer
from rich.console import Console

from qcflag.exceptions import QCFlagError

__all__ = ["app", "err_console", "guard", "main"]

F = TypeVar("F", bound=Callable[..., Any])

app = typer.Typer(
    name="qcflag",
    help=(
        "Graded quality-control flags for hydrographic profiles. Automated flags assist "
        "expert QC and do not replace it; your data programme's standards prevail."
    ),
    no_args_is_help=True,
    add_completion=False,
    pretty_exceptions_enable=False,
    rich_markup_mode=None,
)
err_console = Console(stderr=True, highlight=False, soft_wrap=True)


def fail(message: str, code: int = 1) -> typer.Exit:
    """Print ``error: message`` on one line of stderr and return the exit to raise."""
    err_console.print(f"error: {message}", markup=False)
    return typer.Exit(code=code)


def _print_warnings(caught: list[warnings.WarningMessage]) -> None:
    """Print each distinct warning as one ``warning:`` line on stderr (no source line)."""
    seen: set[str] = set()
    for w in caught:
        text = " ".join(str(w.message).split())
        if w.category.__module__.split(".")[0] != "qcflag":
            text = f"{w.category.__name__}: {text}"
        if text not in seen:
            seen.add(text)
            err_console.print(f"warning: {text}", markup=False)


def guard(func: F) -> F:
    """Run a command, turning qcflag and OS errors into one line and exit code 1.

    Warnings raised while the command runs (e.g. rows dropped from a file cut mid-line) are
    printed as one ``warning:`` line each, without Python's source-line echo.
    """

    @functools.wraps(func)
    def wrapper(*args: Any, **kwargs: Any) -> Any:
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("default")
            try:
                return _run(*args, **kwargs)
            finally:
                _print_warnings(caught)

    def _run(*args: Any, **kwargs: Any) -> Any:
        try:
            return func(*args, **kwargs)
        except QCFlagError as exc:
            raise fail(str(exc).replace("\n", " ")) from None
        except FileNotFoundError as exc:
            raise fail(f"{exc.filename}: no such file") from None
        except PermissionError as exc:
            raise fail(f"{exc.filename}: permission denied") from None
        except IsADirectoryError as exc:
            raise fail(f"{exc.filename}: is a directory, expected a file") from None
        except MemoryError:
            raise fail("out of memory; process fewer files at once or use --workers") from None
        except KeyboardInterrupt:
            raise fail("interrupted; no partial output was left behind", code=130) from None

    return wrapper  # type: ignore[return-value]


def main() -> None:
    """Console-script entry point."""
    try:
        app()
    except QCFlagError as exc:  # pragma: no cover - commands guard themselves
        err_console.print(f"error: {exc}", markup=False)
        sys.exit(1)
