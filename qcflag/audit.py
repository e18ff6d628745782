"""Where automatic and manual flags disagree, ranked for a person to review.

Two kinds of rows:

``disagreement``
    The manual flag is a grade (state ``ASSESSED``) and the automatic grade differs.
``missed_fault``
    The level carries no manual grade (no flag, or "not evaluated") but the automatic grade
    is probably bad or bad.

Each row gets ``p_manual_wrong``, the fused probability that the true grade lies on the
other side of the good/bad divide (grades {1, 2} versus {3, 4}) from the manual flag (an
absent manual flag counts as good), and ``score = p_manual_wrong * |grade_gap|``: how sure
the tool is that the manual flag is wrong, times how far apart the two grades are. For
rules-only results, ``p_manual_wrong`` is the rule confidence where the grades lie on
opposite sides of the divide and 0 otherwise.

The ranking is only as good as the model's independence from the flags it audits: audit
cruises the model was not trained on.
"""

from __future__ import annotations

import os
from collections.abc import Iterable, Sequence
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd

from qcflag.exceptions import QCFlagError
from qcflag.schemes import State, format_codes

if TYPE_CHECKING:
    from qcflag.profiles import ProfileBatch
    from qcflag.result import FlagResult

__all__ = [
    "AUDIT_COLUMNS",
    "audit",
    "audit_files",
    "audit_summary",
    "review_queue",
    "write_audit",
]

AUDIT_COLUMNS: tuple[str, ...] = (
    "profile_id", "cruise", "operator", "level", "pressure", "variable", "value",
    "manual_code", "manual_grade", "auto_grade", "confidence", "grade_gap",
    "p_manual_wrong", "score", "kind", "reasons",
)


def _operator(batch: ProfileBatch) -> np.ndarray:
    if "operator" in batch.profiles.columns:
        return batch.profiles["operator"].astype(object).where(
            batch.profiles["operator"].notna(), ""
        ).astype(str).to_numpy()
    return np.full(batch.n_profiles, "", dtype=object)


def audit(
    batch: ProfileBatch,
    result: FlagResult,
    *,
    variables: Sequence[str] = ("temperature", "salinity"),
) -> pd.DataFrame:
    """Levels where automatic and manual grades disagree, most suspicious first.

    Parameters
    ----------
    batch : ProfileBatch
        The profiles with their manual flags.
    result : FlagResult
        Automatic flags of the same batch (:func:`qcflag.pipeline.flag_batch`).
    variables : sequence of str, default=("temperature", "salinity")
        Variables audited (those present in `result`).

    Returns
    -------
    pandas.DataFrame
        Columns :data:`AUDIT_COLUMNS` (``operator`` empty where unknown; ``level`` is the
        index within the profile; ``manual_grade`` 0 where the level carries no manual
        grade; ``grade_gap`` = auto - manual, an absent manual grade counting as 1), sorted
        by ``score`` descending, ties broken by profile, level and variable order.
    """
    pieces = []
    pid = batch.profiles["profile_id"].astype(str).to_numpy()
    cruise = batch.profiles["cruise"].astype(str).to_numpy()
    oper = _operator(batch)
    for vi, var in enumerate(variables):
        if var not in result.variables:
            continue
        vf = result.variables[var]
        if vf.grade.shape != (batch.n_levels,):
            raise QCFlagError(f"{var}: flags do not match the batch; flag this batch again")
        mg, ms = batch.manual_grade(var)
        auto = vf.grade.astype(np.int64)
        auto_ok = vf.state == State.ASSESSED
        manual_ok = ms == State.ASSESSED
        no_manual = np.isin(ms, [State.ABSENT, State.NOT_EVALUATED])
        disagree = manual_ok & auto_ok & (mg != auto)
        missed = no_manual & auto_ok & (auto >= 3)
        rows = np.flatnonzero(disagree | missed)
        if rows.size == 0:
            continue
        m = np.where(manual_ok[rows], mg[rows], 0).astype(np.int64)
        a = auto[rows]
        m_side_bad = m >= 3
        if vf.proba is not None:
            p_bad = vf.proba[rows, 2:].sum(axis=1)
            p_wrong = np.where(m_side_bad, 1.0 - p_bad, p_bad)
        else:
            opposite = (a >= 3) != m_side_bad
            p_wrong = np.where(opposite, vf.confidence[rows], 0.0)
        gap = a - np.where(m > 0, m, 1)
        codes = batch.flags.get(var)
        manual_code = (format_codes(codes[rows]) if codes is not None
                       else np.full(rows.size, "", dtype=object))
        prof = batch.profile_index[rows]
        pieces.append(pd.DataFrame({
            "profile_id": pid[prof],
            "cruise": cruise[prof],
            "operator": oper[prof],
            "level": batch.level_index[rows],
            "pressure": batch.pressure[rows],
            "variable": var,
            "value": batch.values(var)[rows],
            "manual_code": manual_code,
            "manual_grade": m,
            "auto_grade": a,
            "confidence": vf.confidence[rows],
            "grade_gap": gap,
            "p_manual_wrong": p_wrong,
            "score": p_wrong * np.abs(gap),
            "kind": np.where(missed[rows], "missed_fault", "disagreement"),
            "reasons": vf.reasons[rows],
            "_order": rows * len(variables) + vi,
        }))
    if not pieces:
        table = pd.DataFrame({c: pd.Series(dtype=object) for c in AUDIT_COLUMNS})
        return table
    table = pd.concat(pieces, ignore_index=True)
    order = np.lexsort((table["_order"].to_numpy(), -table["score"].to_numpy()))
    return table.iloc[order].drop(columns="_order").reset_index(drop=True)


def review_queue(audit_table: pd.DataFrame, batch: ProfileBatch | None = None) -> pd.DataFrame:
    """Profiles ordered for a person to review: likely manual errors and missed faults first.

    Parameters
    ----------
    audit_table : pandas.DataFrame
        Output of :func:`audit` (possibly concatenated over several files).
    batch : ProfileBatch, optional
        Adds ``n_levels`` of each queued profile.

    Returns
    -------
    pandas.DataFrame
        One row per profile with at least one audit row: ``rank``, ``profile_id``,
        ``cruise``, ``operator``, ``expected_manual_errors`` (sum of ``p_manual_wrong``),
        ``n_disagreements``, ``n_missed_faults``, ``max_score``, ``total_score``,
        ``variables``; sorted by ``total_score`` then ``max_score`` descending.
    """
    cols = ["rank", "profile_id", "cruise", "operator", "expected_manual_errors",
            "n_disagreements", "n_missed_faults", "max_score", "total_score", "variables"]
    if audit_table.empty:
        return pd.DataFrame({c: pd.Series(dtype=object) for c in cols})
    t = audit_table.assign(
        _dis=(audit_table["kind"] == "disagreement").astype(int),
        _mis=(audit_table["kind"] == "missed_fault").astype(int),
        _first=np.arange(len(audit_table)),
    )
    g = t.groupby(["cruise", "profile_id", "operator"], sort=False)
    q = g.agg(
        expected_manual_errors=("p_manual_wrong", "sum"),
        n_disagreements=("_dis", "sum"),
        n_missed_faults=("_mis", "sum"),
        max_score=("score", "max"),
        total_score=("score", "sum"),
        variables=("variable", lambda s: ";".join(sorted(set(s)))),
        _first=("_first", "min"),
    ).reset_index()
    q = q.sort_values(["total_score", "max_score", "_first"], ascending=[False, False, True],
                      kind="stable").reset_index(drop=True)
    q.insert(0, "rank", np.arange(1, len(q) + 1))
    if batch is not None:
        counts = pd.DataFrame({
            "cruise": batch.profiles["cruise"].astype(str),
            "profile_id": batch.profiles["profile_id"].astype(str),
            "n_levels": batch.counts,
        }).drop_duplicates(["cruise", "profile_id"])
        q = q.merge(counts, on=["cruise", "profile_id"], how="left")
        cols = [*cols, "n_levels"]
    return q[cols]


def _assessed_counts(
    batch: ProfileBatch, variables: Sequence[str]
) -> pd.DataFrame:
    """Manually assessed levels per cruise and operator (denominators of the rates)."""
    n = np.zeros(batch.n_profiles, dtype=np.int64)
    for var in variables:
        _, ms = batch.manual_grade(var)
        csum = np.concatenate([[0], np.cumsum(ms == State.ASSESSED)])
        n += csum[batch.offsets[1:]] - csum[batch.offsets[:-1]]
    return pd.DataFrame({
        "cruise": batch.profiles["cruise"].astype(str).to_numpy(),
        "operator": _operator(batch),
        "n_assessed": n,
    })


def audit_summary(
    audit_table: pd.DataFrame,
    batch: ProfileBatch | pd.DataFrame,
    *,
    variables: Sequence[str] = ("temperature", "salinity"),
) -> pd.DataFrame:
    """Disagreement per cruise and per operator.

    Parameters
    ----------
    audit_table : pandas.DataFrame
        Output of :func:`audit`.
    batch : ProfileBatch or pandas.DataFrame
        The audited batch, or a table of ``cruise``, ``operator``, ``n_assessed`` per
        profile (to summarise several files streamed one at a time).
    variables : sequence of str
        Variables audited.

    Returns
    -------
    pandas.DataFrame
        Rows ``group`` ("cruise" or "operator") and ``name``, with ``n_assessed`` (manually
        graded levels), ``n_disagreements``, ``disagreement_rate``, ``n_missed_faults``,
        ``expected_manual_errors`` and ``mean_score``; operator rows only where known.
    """
    base = batch if isinstance(batch, pd.DataFrame) else _assessed_counts(batch, variables)
    t = audit_table.assign(
        _dis=(audit_table["kind"] == "disagreement").astype(int),
        _mis=(audit_table["kind"] == "missed_fault").astype(int),
    )
    out = []
    for group in ("cruise", "operator"):
        denom = base.groupby(group, sort=True)["n_assessed"].sum()
        if group == "operator":
            denom = denom[denom.index != ""]
        if denom.empty:
            continue
        agg = t.groupby(group).agg(
            n_disagreements=("_dis", "sum"),
            n_missed_faults=("_mis", "sum"),
            expected_manual_errors=("p_manual_wrong", "sum"),
            mean_score=("score", "mean"),
        ) if not t.empty else pd.DataFrame(
            columns=["n_disagreements", "n_missed_faults", "expected_manual_errors",
                     "mean_score"])
        s = pd.DataFrame({"n_assessed": denom}).join(agg, how="left")
        s[["n_disagreements", "n_missed_faults"]] = (
            s[["n_disagreements", "n_missed_faults"]].fillna(0).astype(np.int64))
        s["expected_manual_errors"] = s["expected_manual_errors"].astype(float).fillna(0.0)
        s["disagreement_rate"] = s["n_disagreements"] / s["n_assessed"].where(
            s["n_assessed"] > 0)
        s = s.reset_index(names="name")
        s.insert(0, "group", group)
        out.append(s)
    cols = ["group", "name", "n_assessed", "n_disagreements", "disagreement_rate",
            "n_missed_faults", "expected_manual_errors", "mean_score"]
    if not out:
        return pd.DataFrame(columns=cols)
    return pd.concat(out, ignore_index=True)[cols]


def write_audit(
    table: pd.DataFrame, path: str | os.PathLike[str], *, overwrite: bool = False
) -> Path:
    """Write an audit, queue or summary table as CSV, atomically.

    Raises
    ------
    OutputExistsError
        If `path` exists and `overwrite` is false.
    """
    from qcflag.io.atomic import atomic_output

    with atomic_output(path, overwrite=overwrite, suffix=".csv") as tmp:
        table.to_csv(tmp, index=False, lineterminator="\n", float_format="%.6g")
    return Path(path)


def audit_files(
    inputs: Iterable[str | os.PathLike[str]],
    out: str | os.PathLike[str],
    *,
    model: Any,
    rules: Any = None,
    queue: str | os.PathLike[str] | None = None,
    summary: str | os.PathLike[str] | None = None,
    overwrite: bool = False,
    variables: Sequence[str] = ("temperature", "salinity"),
) -> dict[str, Any]:
    """Audit files one at a time against a model and write the tables as CSV.

    Parameters
    ----------
    inputs : iterable of path-like
        Profile files with manual flags (never modified).
    out : path-like
        CSV of the audit rows (:func:`audit`).
    model : QCModel or path-like
        Fitted model (trained on other cruises than the ones audited).
    rules : optional
        Rule set, as in :func:`qcflag.pipeline.flag_batch`.
    queue, summary : path-like, optional
        CSVs of the review queue and the per-cruise / per-operator summary.
    overwrite : bool, default=False
        Replace existing outputs.
    variables : sequence of str
        Variables audited.

    Returns
    -------
    dict
        ``n_rows``, ``n_profiles_queued`` and the paths written.
    """
    from qcflag.io import read_files
    from qcflag.io.atomic import check_writable
    from qcflag.pipeline import flag_batch

    paths = [Path(p) for p in inputs]
    if not paths:
        raise QCFlagError("no input files given")
    targets = [Path(p) for p in (out, queue, summary) if p is not None]
    resolved = {p.resolve() for p in paths}
    for t in targets:
        if t.resolve() in resolved:
            raise QCFlagError(f"{t}: output would replace an input; choose another path")
        check_writable(t, overwrite=overwrite)
    if isinstance(model, (str, os.PathLike)):
        from qcflag.learn import load_model

        model = load_model(model)
    tables, bases, sizes = [], [], []
    for p in paths:
        batch = read_files([p], scheme=None)
        if not any(v in batch.flags for v in variables):
            raise QCFlagError(
                f"{p}: no manual flags for {', '.join(variables)}; the audit compares "
                "automatic with manual flags (give files with <variable>_flag columns)"
            )
        result = flag_batch(batch, model=model, rules=rules)
        tables.append(audit(batch, result, variables=variables))
        bases.append(_assessed_counts(batch, variables))
        sizes.append(pd.DataFrame({
            "cruise": batch.profiles["cruise"].astype(str),
            "profile_id": batch.profiles["profile_id"].astype(str),
            "n_levels": batch.counts,
        }))
    table = pd.concat(tables, ignore_index=True) if tables else audit_table_empty()
    if len(tables) > 1:
        order = np.lexsort((np.arange(len(table)), -table["score"].to_numpy(dtype=float)))
        table = table.iloc[order].reset_index(drop=True)
    written = {"audit": str(write_audit(table, out, overwrite=overwrite))}
    q = review_queue(table)
    if not q.empty:
        q = q.merge(pd.concat(sizes).drop_duplicates(["cruise", "profile_id"]),
                    on=["cruise", "profile_id"], how="left")
    if queue is not None:
        written["queue"] = str(write_audit(q, queue, overwrite=overwrite))
    if summary is not None:
        s = audit_summary(table, pd.concat(bases, ignore_index=True), variables=variables)
        written["summary"] = str(write_audit(s, summary, overwrite=overwrite))
    return {"n_rows": len(table), "n_profiles_queued": len(q), "written": written}


def audit_table_empty() -> pd.DataFrame:
    """Return an audit table with no rows (the columns of :data:`AUDIT_COLUMNS`)."""
    return pd.DataFrame({c: pd.Series(dtype=object) for c in AUDIT_COLUMNS})
