"""Many files: path expansion, format dispatch, streaming and concatenating readers, writer."""

from __future__ import annotations

import glob
import os
import sys
from collections.abc import Iterable, Iterator, Mapping
from pathlib import Path

from qcflag.exceptions import InputFileError, QCFlagError
from qcflag.io.common import AddedColumn
from qcflag.profiles import ProfileBatch

__all__ = ["expand_paths", "iter_batches", "read_file", "read_files", "write"]

CSV_SUFFIXES = (".csv", ".txt", ".tsv")
NETCDF_SUFFIXES = (".nc", ".nc4", ".cdf", ".netcdf")
_GLOB_CHARS = set("*?[")


def expand_paths(paths: str | os.PathLike[str] | Iterable[str | os.PathLike[str]]) -> list[Path]:
    """Expand files, folders (recursively: ``*.csv``, ``*.nc``) and glob patterns.

    Parameters
    ----------
    paths : path-like or iterable of path-like
        Files, folders or glob patterns (``**`` recurses).

    Returns
    -------
    list of Path
        Sorted, without duplicates.

    Raises
    ------
    InputFileError
        If a path does not exist or a pattern/folder matches no file.
    """
    if isinstance(paths, str | os.PathLike):
        paths = [paths]
    out: set[Path] = set()
    for item in paths:
        p = Path(item)
        if p.is_dir():
            found = [f for f in p.rglob("*") if f.is_file() and f.suffix.lower() in
                     (".csv", ".nc") and not f.name.startswith(".")]
            if not found:
                raise InputFileError(p, "folder holds no .csv or .nc file",
                                     "give the files or a folder that contains them")
            out.update(found)
        elif p.is_file():
            out.add(p)
        elif _GLOB_CHARS & set(str(item)):
            found = [Path(f) for f in glob.glob(str(item), recursive=True) if Path(f).is_file()]
            if not found:
                raise InputFileError(item, "pattern matches no file", "check the pattern")
            out.update(found)
        else:
            raise InputFileError(p, "no such file or folder", "check the path")
    if not out:
        raise InputFileError(None, "no input files given", "name at least one file")
    return sorted(out, key=lambda f: str(f))


def file_format(path: Path) -> str:
    """``"csv"`` or ``"netcdf"``, from the suffix, else from the first bytes."""
    suffix = path.suffix.lower()
    if suffix in NETCDF_SUFFIXES:
        return "netcdf"
    if suffix in CSV_SUFFIXES:
        return "csv"
    with path.open("rb") as fh:
        head = fh.read(8)
    return "netcdf" if head.startswith((b"CDF", b"\x89HDF")) else "csv"


def read_file(
    path: str | os.PathLike[str],
    *,
    scheme: str | None = None,
    columns: Mapping[str, str] | None = None,
) -> ProfileBatch:
    """Read one CSV or NetCDF file (chosen by suffix, else by content).

    Parameters
    ----------
    path : path-like
        The file.
    scheme : str, optional
        Flag scale (CSV: default ``"argo"``; NetCDF: used when the file does not say).
    columns : mapping of str to str, optional
        Explicit CSV column names ``{canonical: actual}`` (ignored for NetCDF).

    Returns
    -------
    ProfileBatch
    """
    from qcflag.io.csv import read_csv
    from qcflag.io.netcdf import read_netcdf

    p = Path(path)
    if not p.exists():
        raise FileNotFoundError(2, "no such file", str(p))
    if file_format(p) == "netcdf":
        return read_netcdf(p, scheme=scheme)
    return read_csv(p, scheme=scheme or "argo", columns=columns)


def iter_batches(
    paths: str | os.PathLike[str] | Iterable[str | os.PathLike[str]],
    *,
    scheme: str | None = None,
    columns: Mapping[str, str] | None = None,
) -> Iterator[tuple[Path, ProfileBatch]]:
    """Yield ``(path, batch)`` one file at a time (for streaming and dask).

    Parameters
    ----------
    paths : path-like or iterable of path-like
        Files, folders or globs (see :func:`expand_paths`).
    scheme : str, optional
        Flag scale (see :func:`read_file`).
    columns : mapping of str to str, optional
        Explicit CSV column names.

    Yields
    ------
    tuple of (Path, ProfileBatch)
    """
    for p in expand_paths(paths):
        yield p, read_file(p, scheme=scheme, columns=columns)


def _progress_wanted(n_files: int, progress: bool) -> bool:
    return progress and n_files > 1 and sys.stderr.isatty()


def read_files(
    paths: str | os.PathLike[str] | Iterable[str | os.PathLike[str]],
    *,
    scheme: str | None = None,
    columns: Mapping[str, str] | None = None,
    progress: bool = False,
) -> ProfileBatch:
    """Read and concatenate files into one batch.

    Parameters
    ----------
    paths : path-like or iterable of path-like
        Files, folders or globs (see :func:`expand_paths`).
    scheme : str, optional
        Flag scale (see :func:`read_file`).
    columns : mapping of str to str, optional
        Explicit CSV column names.
    progress : bool, default=False
        Show a progress bar on stderr when there are several files and stderr is a terminal.

    Returns
    -------
    ProfileBatch

    Raises
    ------
    QCFlagError
        If a file cannot be read, or files use different flag scales.
    """
    files = expand_paths(paths)
    batches: list[ProfileBatch] = []
    if _progress_wanted(len(files), progress):
        from rich.progress import Progress

        with Progress(transient=True) as bar:
            task = bar.add_task("reading", total=len(files))
            for f in files:
                batches.append(read_file(f, scheme=scheme, columns=columns))
                bar.advance(task)
    else:
        batches = [read_file(f, scheme=scheme, columns=columns) for f in files]
    if len(batches) == 1:
        return batches[0]
    try:
        batch = ProfileBatch.concat(batches)
    except QCFlagError as exc:
        raise InputFileError(None, f"cannot combine {len(files)} files: {exc}",
                             "read files with different flag scales separately") from None
    batch.attrs["sources"] = [str(f) for f in files]
    return batch


def write(
    batch: ProfileBatch,
    path: str | os.PathLike[str],
    *,
    added: Mapping[str, AddedColumn] | None = None,
    overwrite: bool = False,
    history: str | None = None,
) -> Path:
    """Write a batch as CSV or CF NetCDF, chosen by the suffix of `path`.

    Parameters
    ----------
    batch : ProfileBatch
        The batch.
    path : path-like
        ``.csv`` or ``.nc`` output file.
    added : mapping of str to AddedColumn, optional
        Per-level columns to add (automatic flags, confidence, reasons).
    overwrite : bool, default=False
        Replace an existing file.
    history : str, optional
        NetCDF history line or command (see :func:`qcflag.io.netcdf.history_line`).

    Returns
    -------
    Path

    Raises
    ------
    QCFlagError
        If the suffix is neither; OutputExistsError if the file exists.
    """
    from qcflag.io.csv import write_csv
    from qcflag.io.netcdf import write_netcdf

    p = Path(path)
    suffix = p.suffix.lower()
    if suffix == ".csv":
        return write_csv(batch, p, added=added, overwrite=overwrite, history=history)
    if suffix in (".nc", ".nc4"):
        return write_netcdf(batch, p, added=added, overwrite=overwrite, history=history)
    raise QCFlagError(f"{p}: cannot tell the output format from {suffix or 'no suffix'!r} "
                      "(use .csv or .nc)")
