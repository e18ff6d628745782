"""Flag whole archives: many files, big files, one laptop or an existing dask cluster.

The unit of distribution is a file (small files are packed several to a dask task, each
still flagged on its own; see :func:`_pack_units`). A task opens each of its files, flags it
in chunks of whole profiles (so the working memory of the checks, features and model grows
with the chunk, not the file), writes its output atomically and returns only a small
summary per file. The driver
never holds level data: it submits a bounded number of tasks at a time and gathers their
summaries, so an archive far larger than memory streams through in constant space.

Because flagging a set of whole cruises gives the same flags as flagging them with the rest
(:func:`qcflag.pipeline.flag_batch` compares a profile only with its own cruise, and chunks
never split a cruise), the chunk size and the number of workers do not change a single
byte of the output: ``--workers 2`` writes
the same files as ``--workers 1`` and as the single-process :func:`qcflag.pipeline.flag_files`
given the same history line.

dask is imported inside the functions that use it (it is only needed for ``workers > 1``
or an existing cluster).
"""

from __future__ import annotations

import contextlib
import os
import time
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from qcflag.exceptions import QCFlagError

if TYPE_CHECKING:
    from qcflag.profiles import ProfileBatch

__all__ = [
    "DEFAULT_CHUNK_LEVELS",
    "ArchiveSummary",
    "FileSummary",
    "cruise_groups",
    "flag_file_group",
    "flag_files_parallel",
    "local_cluster",
    "warm_worker",
]

_COUNT_KEYS = ("1", "2", "3", "4", "missing")

CONNECT_TIMEOUT = "20s"
"""How long to keep trying to reach a ``--scheduler`` address."""

DEFAULT_CHUNK_LEVELS = 1_000_000
"""Levels flagged at once inside a task (whole profiles; about 0.5 GB of working memory)."""


@dataclass(frozen=True)
class FileSummary:
    """What one task reports back about one input file.

    Parameters
    ----------
    input, output : str
        Input file and the file written.
    n_profiles, n_levels : int
        Profiles and levels flagged.
    grade_counts : dict of str to dict of str to int
        Per variable, levels given grade ``"1"`` ... ``"4"`` and ``"missing"`` (no grade),
        as in :class:`qcflag.pipeline.FlagSummary`.
    seconds : float
        Wall time of the task (read, flag, write).
    """

    input: str
    output: str
    n_profiles: int
    n_levels: int
    grade_counts: dict[str, dict[str, int]]
    seconds: float


@dataclass
class ArchiveSummary:
    """Summary of a run over many files.

    Parameters
    ----------
    files : list of FileSummary
        One entry per input, in input order.
    workers : int
        Number of dask workers used (1 means in this process, without dask).
    scheduler : str or None
        Address of the scheduler, or None for an in-process run.
    seconds : float
        Wall time of the whole run.
    rules_only : bool
        True when no model was used.
    """

    files: list[FileSummary] = field(default_factory=list)
    workers: int = 1
    scheduler: str | None = None
    seconds: float = 0.0
    rules_only: bool = True

    @property
    def n_files(self) -> int:
        """Number of files flagged."""
        return len(self.files)

    @property
    def n_profiles(self) -> int:
        """Profiles flagged over all files."""
        return sum(f.n_profiles for f in self.files)

    @property
    def n_levels(self) -> int:
        """Levels flagged over all files."""
        return sum(f.n_levels for f in self.files)

    @property
    def levels_per_second(self) -> float:
        """End-to-end throughput of the run, levels per second."""
        return self.n_levels / self.seconds if self.seconds > 0 else float("nan")

    def grade_counts(self) -> dict[str, dict[str, int]]:
        """Per variable, levels given grade ``"1"`` ... ``"4"`` and ``"missing"``."""
        out: dict[str, dict[str, int]] = {}
        for f in self.files:
            for var, counts in f.grade_counts.items():
                acc = out.setdefault(var, dict.fromkeys(_COUNT_KEYS, 0))
                for k, c in counts.items():
                    acc[k] += c
        return out

    def to_dict(self) -> dict[str, Any]:
        """Return a JSON-ready summary (no per-level data).

        The keys of :meth:`qcflag.pipeline.FlagSummary.to_json` (``outputs``,
        ``n_profiles``, ``n_levels``, ``rules_only``, ``counts``) plus ``workers``,
        ``scheduler``, ``seconds`` and ``levels_per_second``.
        """
        return {
            "outputs": [f.output for f in self.files],
            "n_profiles": self.n_profiles,
            "n_levels": self.n_levels,
            "rules_only": self.rules_only,
            "counts": self.grade_counts(),
            "workers": self.workers,
            "scheduler": self.scheduler,
            "seconds": round(self.seconds, 3),
            "levels_per_second": round(self.levels_per_second, 1),
        }

    def to_json(self) -> str:
        """JSON text of :meth:`to_dict`."""
        import json

        return json.dumps(self.to_dict(), indent=2)


# --------------------------------------------------------------------------- the task
def _concat_added(parts: list[Mapping[str, Any]]) -> dict[str, Any]:
    """Concatenate the added columns of consecutive chunks of one file."""
    from qcflag.io import AddedColumn

    if len(parts) == 1:
        return dict(parts[0])
    out = {}
    for name, first in parts[0].items():
        values = np.concatenate([np.asarray(p[name].values) for p in parts])
        out[name] = AddedColumn(values, dict(first.attrs), first.parent)
    return out


def flag_batch_chunked(
    batch: ProfileBatch,
    *,
    chunk_levels: int = DEFAULT_CHUNK_LEVELS,
    model: Any = None,
    rules: Any = None,
    scheme: str = "argo",
    probabilities: bool = False,
    **options: Any,
) -> tuple[dict[str, Any], dict[str, dict[str, int]]]:
    """Flag `batch` in chunks of whole profiles; return its added columns and grade counts.

    Parameters
    ----------
    batch : ProfileBatch
        Profiles to flag.
    chunk_levels : int, default=DEFAULT_CHUNK_LEVELS
        About how many levels to flag at once (whole profiles; a longer profile is one chunk).
    model, rules, scheme, probabilities, **options
        Passed to :func:`qcflag.pipeline.flag_batch` and
        :func:`qcflag.pipeline.flagged_columns`. `scheme` is the output flag scheme.

    Returns
    -------
    added : dict of str to AddedColumn
        Columns to write beside the original variables, covering the whole batch.
    grade_counts : dict of str to dict of str to int
        Per variable, levels given grade ``"1"`` ... ``"4"`` and ``"missing"``.
    """
    added, grades = _flag_in_chunks(batch, chunk_levels=chunk_levels, model=model,
                                    rules=rules, scheme=scheme, probabilities=probabilities,
                                    **options)
    return added, _tally(grades)


def _tally(grades: Mapping[str, np.ndarray]) -> dict[str, dict[str, int]]:
    """Levels per grade ``"1"`` ... ``"4"`` and ``"missing"`` (grade 0), per variable."""
    out = {}
    for var, g in grades.items():
        c = np.bincount(np.asarray(g, dtype=np.int64), minlength=5)[:5]
        out[var] = {**{str(k): int(c[k]) for k in range(1, 5)}, "missing": int(c[0])}
    return out


def _flag_in_chunks(
    batch: ProfileBatch, *, chunk_levels: int, scheme: str = "argo",
    probabilities: bool = False, **options: Any,
) -> tuple[dict[str, Any], dict[str, np.ndarray]]:
    """Flag `batch` in chunks of whole cruises; return its added columns and level grades."""
    from qcflag.pipeline import flag_batch, flagged_columns

    parts: list[Mapping[str, Any]] = []
    grades: dict[str, list[np.ndarray]] = {}
    chunks = [batch] if batch.n_levels <= chunk_levels else batch.iter_chunks(chunk_levels)
    for chunk in chunks:
        result = flag_batch(chunk, scheme=scheme, **options)
        parts.append(flagged_columns(chunk, result, scheme=scheme,
                                     probabilities=probabilities))
        for var, vf in result.variables.items():
            grades.setdefault(var, []).append(np.asarray(vf.grade))
    if not parts:  # an empty file: flag it whole so the columns exist
        result = flag_batch(batch, scheme=scheme, **options)
        parts.append(flagged_columns(batch, result, scheme=scheme,
                                     probabilities=probabilities))
    return _concat_added(parts), {v: np.concatenate(g) for v, g in grades.items()}


_MODEL_CACHE: dict[tuple[str, int, int], Any] = {}


def _resolve_model(model: Any) -> Any:
    """Load a model given as a path once per process (workers keep it between tasks)."""
    if model is None or not isinstance(model, (str, os.PathLike)):
        return model
    from qcflag.learn import load_model

    p = Path(model)
    st = p.stat()
    key = (str(p.resolve()), st.st_mtime_ns, st.st_size)
    if key not in _MODEL_CACHE:
        _MODEL_CACHE.clear()
        _MODEL_CACHE[key] = load_model(p)
    return _MODEL_CACHE[key]


def _resolve_rules(rules: Any) -> Any:
    """Parse a rule set named or given as a path once per process (tasks share it).

    Parsing and validating the standard set costs a few milliseconds, as much as flagging
    a few thousand levels; a worker flagging many small files would pay it for every file.
    :func:`qcflag.rules._shared_rules` keeps the parsed sets (keyed on the built-in name, or
    the file's path and text, and on the registered checks); tasks only read them.
    """
    from qcflag.rules import _shared_rules

    return _shared_rules(rules)


def flag_one_file(
    path: str | os.PathLike[str],
    out_path: str | os.PathLike[str],
    *,
    chunk_levels: int = DEFAULT_CHUNK_LEVELS,
    overwrite: bool = False,
    history: str | None = None,
    model: Any = None,
    probabilities: bool = False,
    **options: Any,
) -> FileSummary:
    """Read one file, flag it in chunks of whole profiles, write it atomically.

    This is the task every worker runs; it returns only a small summary.

    Parameters
    ----------
    path : path-like
        Input file (any format :func:`qcflag.io.iter_batches` reads).
    out_path : path-like
        Output file (format chosen by its suffix, as :func:`qcflag.io.write` does).
    chunk_levels : int, default=DEFAULT_CHUNK_LEVELS
        About how many levels to flag at once.
    overwrite : bool, default=False
        Replace an existing output.
    history : str, optional
        The history line to append to the output (pass the same string to every task so
        outputs do not depend on when or where a task ran).
    model : OrdinalModel or path-like, optional
        Fitted model, or the path of a saved one (loaded once per worker process).
    probabilities : bool, default=False
        Also write the fused grade probabilities.
    **options
        Passed to :func:`qcflag.pipeline.flag_batch` (``rules``, ``scheme``, ``caution``...).

    Returns
    -------
    FileSummary
    """
    from qcflag.io import iter_batches, write

    t0 = time.perf_counter()
    path = Path(path)
    out_path = Path(out_path)
    model = _resolve_model(model)
    n_profiles = n_levels = 0
    grade_counts: dict[str, dict[str, int]] = {}
    with _local_file_locks():
        for _, batch in iter_batches([path]):
            options["rules"] = _resolve_rules(options.get("rules"))
            added, grade_counts = flag_batch_chunked(
                batch, chunk_levels=chunk_levels, model=model, probabilities=probabilities,
                **options,
            )
            write(batch, out_path, added=added, overwrite=overwrite, history=history)
            n_profiles, n_levels = batch.n_profiles, batch.n_levels
    return FileSummary(str(path), str(out_path), n_profiles, n_levels, grade_counts,
                       time.perf_counter() - t0)


def flag_file_group(
    paths: Sequence[str | os.PathLike[str]],
    out_paths: Sequence[str | os.PathLike[str]],
    *,
    chunk_levels: int = DEFAULT_CHUNK_LEVELS,
    overwrite: bool = False,
    history: str | None = None,
    model: Any = None,
    probabilities: bool = False,
    **options: Any,
) -> list[FileSummary]:
    """Flag files that share cruises as one batch, then write each file's own output.

    The track check and the cruise-relative features look at a whole cruise; when a cruise
    is spread over several files (one file per profile is common for floats), flagging the
    files one by one would show them only part of it. Here the files are read, joined in
    the given order, flagged together (chunks never split a cruise) and written back one
    output per input, each with its own profiles and levels.

    Parameters
    ----------
    paths, out_paths : sequence of path-like
        Inputs and their outputs, in the same order.
    chunk_levels, overwrite, history, model, probabilities, **options
        As for :func:`flag_one_file`.

    Returns
    -------
    list of FileSummary
        One per input, in order (each with the group's time).
    """
    from qcflag.io import AddedColumn, iter_batches, write
    from qcflag.profiles import ProfileBatch

    t0 = time.perf_counter()
    model = _resolve_model(model)
    options["rules"] = _resolve_rules(options.get("rules"))
    with _local_file_locks():
        batches = [ProfileBatch.concat([b for _, b in iter_batches([Path(p)])])
                   for p in paths]
        whole = ProfileBatch.concat(batches)
        added, grades = _flag_in_chunks(whole, chunk_levels=chunk_levels, model=model,
                                        probabilities=probabilities, **options)
        ends = np.cumsum([b.n_levels for b in batches])
        done = []
        for batch, src, dst, stop in zip(batches, paths, out_paths, ends, strict=True):
            start = stop - batch.n_levels
            own = {k: AddedColumn(np.asarray(c.values)[start:stop], dict(c.attrs), c.parent)
                   for k, c in added.items()}
            write(batch, Path(dst), added=own, overwrite=overwrite, history=history)
            counts = _tally({v: g[start:stop] for v, g in grades.items()})
            done.append((str(src), str(dst), batch.n_profiles, batch.n_levels, counts))
    seconds = time.perf_counter() - t0
    return [FileSummary(*d, seconds) for d in done]


def cruise_groups(paths: Sequence[str | os.PathLike[str]]) -> list[list[int]]:
    """Group input files that share a cruise (directly or through other files).

    Parameters
    ----------
    paths : sequence of path-like
        Input files; each is read once to find its cruises.

    Returns
    -------
    list of list of int
        Indices into `paths`: each group sorted, the groups ordered by their first file.
        A file whose cruises no other file has is a group of its own; an empty cruise name
        joins nothing.
    """
    from qcflag.io import iter_batches

    parent = list(range(len(paths)))

    def root(i: int) -> int:
        while parent[i] != i:
            parent[i] = parent[parent[i]]
            i = parent[i]
        return i

    first: dict[str, int] = {}
    for i, p in enumerate(paths):
        for _, batch in iter_batches([Path(p)]):
            for cruise in batch.profiles["cruise"].astype(str).unique():
                if not cruise.strip():  # no cruise name: nothing to join on
                    continue
                j = first.setdefault(cruise, i)
                a, b = root(i), root(j)
                if a != b:
                    parent[max(a, b)] = min(a, b)
    groups: dict[int, list[int]] = {}
    for i in range(len(paths)):
        groups.setdefault(root(i), []).append(i)
    return sorted(groups.values(), key=lambda g: g[0])


def _local_file_locks() -> contextlib.AbstractContextManager[Any]:
    """Inside a dask task, make xarray lock NetCDF files with in-process locks.

    xarray picks its NetCDF write lock from the active dask scheduler; in a task on a
    dask.distributed worker that is a cluster-wide lock held by the scheduler, so every
    variable written costs network round trips (and the first one opens a client
    connection from the worker). A task reads and writes only its own files, and the data
    are in memory (no dask computation runs inside), so the synchronous scheduler's
    process-local locks are enough. Outside dask tasks this does nothing.
    """
    import sys

    if "distributed" not in sys.modules:
        return contextlib.nullcontext()
    from distributed.worker import thread_state

    if not getattr(thread_state, "key", None):
        return contextlib.nullcontext()
    import dask

    return dask.config.set(scheduler="synchronous")


# --------------------------------------------------------------------------- the driver
def _progress(total: int, enabled: bool) -> Any:
    """Start a rich progress bar on stderr (None when disabled)."""
    if not enabled:
        return None
    from rich.console import Console
    from rich.progress import (
        BarColumn,
        MofNCompleteColumn,
        Progress,
        TextColumn,
        TimeElapsedColumn,
        TimeRemainingColumn,
    )

    prog = Progress(
        TextColumn("flagging"),
        BarColumn(),
        MofNCompleteColumn(),
        TextColumn("files"),
        TimeElapsedColumn(),
        TimeRemainingColumn(),
        console=Console(stderr=True),
        transient=False,
    )
    prog.start()
    prog.add_task("flag", total=total)
    return prog


def _client(workers: int, scheduler: str | None) -> tuple[Any, Any]:
    """Connect to `scheduler`, or start a LocalCluster of `workers` single-threaded processes."""
    from distributed import Client

    if scheduler:
        try:
            return Client(scheduler, timeout=CONNECT_TIMEOUT), None
        except OSError as exc:
            raise QCFlagError(
                f"--scheduler {scheduler}: cannot connect ({exc}); check the address and "
                "that the scheduler is running"
            ) from None
    cluster = local_cluster(workers)
    return Client(cluster), cluster


def local_cluster(workers: int) -> Any:
    """Start a dask LocalCluster of `workers` single-threaded worker processes for flagging.

    dask starts worker processes with ``MALLOC_TRIM_THRESHOLD_=65536``, which makes glibc
    hand every freed block above 64 KiB back to the system; flagging allocates and frees
    many arrays of a few hundred KiB per task, so each one then costs fresh page faults
    (measured here: a third more CPU per task, mostly system time). The workers started
    here keep glibc's default (adaptive) thresholds; a task's memory stays bounded by the
    chunk size either way.

    The workers' statistical profiler (a stack sample every 10 ms, shown only on the
    dashboard, which this cluster does not serve) is switched off: it interrupts the
    flagging thread a hundred times a second for nothing.

    Parameters
    ----------
    workers : int
        Number of worker processes.

    Returns
    -------
    distributed.LocalCluster
    """
    import dask
    from distributed import LocalCluster

    with dask.config.set({"distributed.nanny.pre-spawn-environ.MALLOC_TRIM_THRESHOLD_": None,
                          "distributed.worker.profile.enabled": False}):
        return LocalCluster(n_workers=workers, threads_per_worker=1, processes=True,
                            dashboard_address=None, worker_dashboard_address=None,
                            memory_limit="auto")


def warm_worker(rules: Any = None) -> bool:
    """Load what every task needs (modules, reference fields, rule set) into this process.

    Run on each worker once (:meth:`distributed.Client.run`) before tasks are submitted,
    so that the first task of a worker does not pay for imports and for reading the
    packaged climatology and bathymetry. Harmless to call again.

    Parameters
    ----------
    rules : str, path or RuleSet, optional
        Rule set the tasks will use (default: the standard set).

    Returns
    -------
    bool
        True once loaded.
    """
    import gsw  # noqa: F401
    import netCDF4  # noqa: F401
    import xarray  # noqa: F401

    import qcflag.io
    import qcflag.pipeline  # noqa: F401
    from qcflag.checks.registry import available_checks
    from qcflag.reference import fields

    available_checks()  # reference-data checks and plug-ins
    _resolve_rules(rules)  # parsed once; tasks reuse it
    fields._climatology_grid()
    fields._bathymetry_grid()
    return True


def _run_unit(unit_pairs: list[tuple[Path, Path]],
              task_options: dict[str, Any]) -> list[FileSummary]:
    """Flag one unit of work: a single file, or files that share cruises (joined)."""
    if len(unit_pairs) == 1:
        src, dst = unit_pairs[0]
        return [flag_one_file(str(src), str(dst), **task_options)]
    return flag_file_group([str(src) for src, _ in unit_pairs],
                           [str(dst) for _, dst in unit_pairs], **task_options)


def _run_serial(
    pairs: list[tuple[Path, Path]], units: list[list[int]], task_options: dict[str, Any],
    progress: Any,
) -> dict[int, FileSummary]:
    results: dict[int, FileSummary] = {}
    for unit in units:
        results.update(zip(unit, _run_unit([pairs[i] for i in unit], task_options),
                           strict=True))
        if progress is not None:
            for _ in unit:
                progress.advance(0)
    return results


TASK_BYTES = 16 * 2**20
"""Input bytes a dask task aims at: small files are packed together up to this size.

Each task costs the scheduler, the driver and the worker a few milliseconds of messages
whatever its size, and on a small machine the driver and scheduler share the cores with the
workers; a 2 MB file flags in about 80 ms, so one task per small file spends several per
cent of the run on bookkeeping. A file larger than this is a task of its own."""


def _pack_units(units: list[list[int]], sizes: list[int], n_workers: int, *,
                task_bytes: int = TASK_BYTES) -> list[list[int]]:
    """Group units of work into dask tasks, largest first, smaller towards the end.

    Units are taken in decreasing input size (longest-processing-time order, so the workers
    finish together instead of one flagging a big file alone at the end). A task takes
    units until it holds `task_bytes` or, when less, half a worker's share of what remains
    (``remaining / (2 * n_workers)``; guided self-scheduling): tasks shrink as the run
    ends, down to single units, so the workers still finish together. Packing only decides
    which process flags which file: each unit is flagged exactly as on its own.

    Parameters
    ----------
    units : list of list of int
        Units of work (indices of input files flagged together).
    sizes : list of int
        Size in bytes of each input file.
    n_workers : int
        Number of workers the tasks go to.
    task_bytes : int, default=TASK_BYTES
        Input bytes a task aims at.

    Returns
    -------
    list of list of int
        Tasks as lists of unit indices, in submission order; every unit appears once.
    """
    unit_size = [sum(sizes[i] for i in u) for u in units]
    order = sorted(range(len(units)), key=lambda u: -unit_size[u])
    remaining = sum(unit_size)
    tasks: list[list[int]] = []
    acc, target = 0, 0.0
    for u in order:
        if not tasks or acc >= target:
            tasks.append([])
            acc, target = 0, min(task_bytes, remaining / (2 * max(n_workers, 1)))
        tasks[-1].append(u)
        acc += unit_size[u]
        remaining -= unit_size[u]
    return tasks


def _run_task(task_pairs: list[list[tuple[Path, Path]]],
              task_options: dict[str, Any]) -> list[FileSummary]:
    """Flag the units of one dask task one after the other; summaries in the same order."""
    return [s for unit_pairs in task_pairs for s in _run_unit(unit_pairs, task_options)]


def _run_dask(
    pairs: list[tuple[Path, Path]],
    units: list[list[int]],
    task_options: dict[str, Any],
    client: Any,
    n_workers: int,
    progress: Any,
) -> dict[int, FileSummary]:
    from distributed import as_completed

    results: dict[int, FileSummary] = {}
    sizes = []
    for src, _ in pairs:
        try:
            sizes.append(src.stat().st_size)
        except OSError:
            sizes.append(0)
    tasks = _pack_units(units, sizes, n_workers)
    todo = iter(tasks)
    futures: dict[Any, list[int]] = {}

    def submit_next() -> Any:
        try:
            task = next(todo)
        except StopIteration:
            return None
        files = [i for u in task for i in units[u]]
        first = pairs[files[0]][0]
        fut = client.submit(_run_task, [[pairs[i] for i in units[u]] for u in task],
                            task_options, key=f"qcflag-file-{files[0]}-{first.name}",
                            pure=False)
        futures[fut] = files
        return fut

    # two tasks per worker in flight: each worker starts its next task at once, while the
    # driver never holds more than a few summaries
    for _ in range(max(2 * n_workers, 2)):
        if submit_next() is None:
            break
    pending = as_completed(list(futures))
    for fut in pending:
        files = futures.pop(fut)
        try:
            results.update(zip(files, fut.result(), strict=True))
        except BaseException:
            for other in list(futures):
                other.cancel()
            raise
        fut.release()
        if progress is not None:
            for _ in files:
                progress.advance(0)
        new = submit_next()
        if new is not None:
            pending.add(new)
    return results


def flag_files_parallel(
    inputs: Sequence[str | os.PathLike[str]],
    out: str | os.PathLike[str],
    *,
    workers: int = 1,
    scheduler: str | None = None,
    chunk_levels: int = DEFAULT_CHUNK_LEVELS,
    progress: bool = True,
    overwrite: bool = False,
    history: str | None = None,
    model: Any = None,
    join_cruises: bool = False,
    **options: Any,
) -> ArchiveSummary:
    """Flag many files on dask.distributed, streaming one file per task.

    Parameters
    ----------
    inputs : sequence of path-like
        Input files (NetCDF or CSV).
    out : path-like
        Output directory (or the output file when there is a single input), as for
        :func:`qcflag.pipeline.flag_files`.
    workers : int, default=1
        Number of worker processes of the LocalCluster started for the run (one thread
        each). ``1`` without a `scheduler` runs in this process without dask.
    scheduler : str, optional
        Address of an existing dask scheduler (``"tcp://host:8786"``); `workers` is then
        ignored. Workers there must have qcflag installed and see the same file paths.
    chunk_levels : int, default=DEFAULT_CHUNK_LEVELS
        About how many levels a task flags at once (whole profiles).
    progress : bool, default=True
        Show a progress bar on stderr.
    overwrite : bool, default=False
        Replace existing outputs.
    history : str, optional
        Command recorded in the history line, or a complete line (starting with an ISO
        8601 timestamp) kept as is; default: this process's arguments. The line is made
        once here, so every task writes the same line whatever worker runs it and when.
    model : OrdinalModel or path-like, optional
        Fitted model, or the path of a saved one (each worker loads it once).
    join_cruises : bool, default=False
        Flag files that share a cruise together, in one task (:func:`flag_file_group`), so
        the track check and the cruise-relative features see the whole cruise; each file
        still gets its own output. The inputs are read once more beforehand to find their
        cruises (:func:`cruise_groups`).
    **options
        Passed to :func:`qcflag.pipeline.flag_batch` (``rules``, ``scheme``, ``caution``,
        ``probabilities``...).

    Returns
    -------
    ArchiveSummary
        Per-file summaries in input order and the run's throughput.

    Raises
    ------
    InputFileError
        If an input is missing or two inputs would write the same output.
    OutputExistsError
        If an output exists and `overwrite` is false (checked before any work starts).
    QCFlagError
        Any error a task raises (the first one stops the run; outputs already written
        stay, none is left half-written).
    """
    if workers < 1:
        raise QCFlagError(f"--workers {workers}: must be at least 1")
    if chunk_levels < 1:
        raise QCFlagError(f"chunk_levels {chunk_levels}: must be at least 1")
    t0 = time.perf_counter()
    from qcflag.pipeline import plan_outputs

    pairs = plan_outputs(inputs, out, overwrite)
    from qcflag.io.netcdf import history_line

    history = history_line(history)
    task_options = dict(options, chunk_levels=chunk_levels, overwrite=overwrite,
                        history=history, model=model)
    units = (cruise_groups([src for src, _ in pairs]) if join_cruises
             else [[i] for i in range(len(pairs))])
    bar = _progress(len(pairs), progress)
    try:
        if workers == 1 and not scheduler:
            results = _run_serial(pairs, units, task_options, bar)
            summary = ArchiveSummary([results[i] for i in range(len(pairs))], workers=1,
                                     scheduler=None)
        else:
            client, cluster = _client(workers, scheduler)
            try:
                n = len(client.scheduler_info(n_workers=-1)["workers"]) or workers
                client.run(warm_worker, options.get("rules"))  # before the first task
                results = _run_dask(pairs, units, task_options, client, n, bar)
                summary = ArchiveSummary([results[i] for i in range(len(pairs))], workers=n,
                                         scheduler=scheduler or client.scheduler.address)
            finally:
                client.close()
                if cluster is not None:
                    cluster.close()
    finally:
        if bar is not None:
            bar.stop()
    summary.seconds = time.perf_counter() - t0
    summary.rules_only = model is None
    return summary
