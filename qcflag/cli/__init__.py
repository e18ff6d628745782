"""The ``qcflag`` command line: a thin typer app over the library.

Each command lives in its own module and registers itself on :data:`app`; the library is
imported lazily inside the commands so that ``qcflag --help`` stays fast.
"""

from __future__ import annotations

from qcflag.cli._app import app, main

# Importing a command module registers its command(s) on ``app``.
from qcflag.cli import _basic  # noqa: F401  isort: skip
from qcflag.cli import train  # noqa: F401  isort: skip
from qcflag.cli import report  # noqa: F401  isort: skip
from qcflag.cli import simulate  # noqa: F401  isort: skip
from qcflag.cli import inspect  # noqa: F401  isort: skip
from qcflag.cli import convert  # noqa: F401  isort: skip
from qcflag.cli import flag  # noqa: F401  isort: skip

__all__ = ["app", "main"]
