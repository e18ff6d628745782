"""Atomic output: write to a temporary file beside the target, then rename."""

from __future__ import annotations

import contextlib
import os
import tempfile
from collections.abc import Iterator
from pathlib import Path

from qcflag.exceptions import OutputExistsError

__all__ = ["atomic_output", "check_writable"]


def check_writable(path: str | os.PathLike[str], *, overwrite: bool = False) -> Path:
    """Refuse an existing output unless `overwrite`; return the path.

    Raises
    ------
    OutputExistsError
        If `path` exists and `overwrite` is false.
    """
    p = Path(path)
    if p.exists() and not overwrite:
        raise OutputExistsError(f"{p}: output exists; pass --overwrite to replace it")
    return p


@contextlib.contextmanager
def atomic_output(
    path: str | os.PathLike[str], *, overwrite: bool = False, suffix: str | None = None
) -> Iterator[Path]:
    """Yield a temporary path to write; on success it replaces `path` atomically.

    The temporary file lives in the target's directory (so the final rename is atomic on
    POSIX) and is removed if the block raises, so an interrupted run leaves no half-written
    output behind.

    Parameters
    ----------
    path : path-like
        Final output path.
    overwrite : bool, default=False
        Allow replacing an existing file.
    suffix : str, optional
        Suffix of the temporary file (defaults to the target's, so writers that choose a
        format by suffix still work).

    Raises
    ------
    OutputExistsError
        If `path` exists and `overwrite` is false.
    """
    target = check_writable(path, overwrite=overwrite)
    target.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(
        prefix=f".{target.name}.tmp-",
        suffix=suffix if suffix is not None else target.suffix,
        dir=target.parent,
    )
    os.close(fd)
    tmp_path = Path(tmp)
    try:
        yield tmp_path
        if not overwrite and target.exists():
            raise OutputExistsError(f"{target}: output appeared while writing; not replaced")
        os.chmod(tmp_path, 0o644)
        os.replace(tmp_path, target)
    finally:
        with contextlib.suppress(FileNotFoundError):
            tmp_path.unlink()
