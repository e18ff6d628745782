"""Exceptions raised by qcflag.

Every error a user can cause with bad input derives from :class:`QCFlagError`. The command
line catches it and prints its one-line message; a traceback means a bug in qcflag.
"""

from __future__ import annotations

__all__ = [
    "InputFileError",
    "InvalidProfileError",
    "ModelFileError",
    "OutputExistsError",
    "QCFlagError",
    "RuleSetError",
    "UnitsError",
]


class QCFlagError(Exception):
    """Base class of every error qcflag raises on purpose."""


class InvalidProfileError(QCFlagError, ValueError):
    """A profile batch is inconsistent (lengths, dtypes, offsets, units)."""


class InputFileError(QCFlagError, ValueError):
    """An input file cannot be read as profiles.

    Parameters
    ----------
    path : str or path-like or None
        The offending file.
    problem : str
        What is wrong, naming the variable or column where there is one.
    fix : str, optional
        What the user can do about it.
    """

    def __init__(self, path: object, problem: str, fix: str | None = None) -> None:
        self.path = None if path is None else str(path)
        self.problem = problem
        self.fix = fix
        where = f"{self.path}: " if self.path else ""
        tail = f" ({fix})" if fix else ""
        super().__init__(f"{where}{problem}{tail}")


class UnitsError(InputFileError):
    """A variable's units are unknown or its values plainly contradict them."""


class RuleSetError(QCFlagError, ValueError):
    """A rule-set file is malformed; the message names the file and line."""


class ModelFileError(QCFlagError, ValueError):
    """A model file is unreadable, tampered with, or from an incompatible version."""


class OutputExistsError(QCFlagError, FileExistsError):
    """An output file exists and ``overwrite`` was not requested."""
