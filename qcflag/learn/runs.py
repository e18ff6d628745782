"""The runs log: every train and evaluate run, in a small SQLite database.

The database ``runs.sqlite`` lives beside the model files (:func:`runs_db_for`). One row per
run: UTC time, command (``train``/``evaluate``), model path, training or evaluation data
fingerprint, metrics as JSON, qcflag version and a free-form note. Each insert is one SQLite
transaction, so an interrupted run leaves the log consistent.
"""

from __future__ import annotations

import contextlib
import datetime as _dt
import json
import os
import sqlite3
from pathlib import Path
from typing import Any

import pandas as pd

from qcflag.exceptions import QCFlagError

__all__ = ["RUNS_DB_NAME", "list_runs", "log_run", "runs_db_for"]

RUNS_DB_NAME = "runs.sqlite"

_SCHEMA = """
CREATE TABLE IF NOT EXISTS runs (
    id INTEGER PRIMARY KEY AUTOINCREMENT,
    time_utc TEXT NOT NULL,
    command TEXT NOT NULL,
    model_path TEXT NOT NULL,
    data_fingerprint TEXT,
    n_levels INTEGER,
    metrics TEXT NOT NULL,
    qcflag_version TEXT NOT NULL,
    note TEXT NOT NULL DEFAULT ''
)
"""


def runs_db_for(model_path: str | os.PathLike[str]) -> Path:
    """Path of the runs database beside a model file."""
    return Path(model_path).resolve().parent / RUNS_DB_NAME


@contextlib.contextmanager
def _connect(db: Path, *, create: bool) -> Any:
    if not create and not db.exists():
        raise QCFlagError(f"{db}: no runs database here; train or evaluate a model first")
    try:
        con = sqlite3.connect(db, timeout=30)
    except sqlite3.Error as exc:
        raise QCFlagError(f"{db}: cannot open the runs database ({exc})") from None
    try:
        yield con
    except sqlite3.DatabaseError as exc:
        raise QCFlagError(f"{db}: runs database is unreadable ({exc}); move it aside") from None
    finally:
        con.close()


def log_run(
    db: str | os.PathLike[str],
    *,
    command: str,
    model_path: str | os.PathLike[str],
    metrics: dict[str, Any],
    data_fingerprint: str | None = None,
    n_levels: int | None = None,
    note: str = "",
) -> int:
    """Append one run to the database (created if needed); return its id.

    Parameters
    ----------
    db : path-like
        Database file.
    command : str
        ``"train"`` or ``"evaluate"`` (free text allowed).
    model_path : path-like
        The model trained or evaluated.
    metrics : dict
        JSON-able metrics (NaN becomes null).
    data_fingerprint : str, optional
        SHA-256 of the data (:func:`qcflag.learn.model.data_fingerprint`).
    n_levels : int, optional
        Levels used.
    note : str, default=""
        Free text.
    """
    from qcflag._version import __version__
    from qcflag.learn.evaluation import _jsonable

    path = Path(db)
    path.parent.mkdir(parents=True, exist_ok=True)
    now = _dt.datetime.now(_dt.UTC).strftime("%Y-%m-%dT%H:%M:%SZ")
    payload = json.dumps(_jsonable(metrics), sort_keys=True, allow_nan=False)
    with _connect(path, create=True) as con, con:
        con.execute(_SCHEMA)
        cur = con.execute(
            "INSERT INTO runs (time_utc, command, model_path, data_fingerprint, n_levels, "
            "metrics, qcflag_version, note) VALUES (?, ?, ?, ?, ?, ?, ?, ?)",
            (now, command, str(Path(model_path).resolve()), data_fingerprint, n_levels,
             payload, __version__, note),
        )
        return int(cur.lastrowid or 0)


def list_runs(db: str | os.PathLike[str], *, model_path: str | os.PathLike[str] | None = None
              ) -> pd.DataFrame:
    """All runs in the database (oldest first), optionally only those of one model.

    Returns
    -------
    pandas.DataFrame
        Columns ``id, time_utc, command, model_path, data_fingerprint, n_levels, metrics``
        (parsed JSON), ``qcflag_version, note``.
    """
    path = Path(db)
    with _connect(path, create=False) as con:
        con.execute(_SCHEMA)
        query = "SELECT * FROM runs"
        args: tuple[Any, ...] = ()
        if model_path is not None:
            query += " WHERE model_path = ?"
            args = (str(Path(model_path).resolve()),)
        df = pd.read_sql_query(query + " ORDER BY id", con, params=args)
    df["metrics"] = [json.loads(m) for m in df["metrics"]]
    return df
