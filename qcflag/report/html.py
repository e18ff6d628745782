"""Write the per-cruise HTML reports, their index and their JSON summaries.

Each page is self-contained: figures are embedded as base64 PNG, styles are inline, there is
no script other than a JSON data block, so a page opens from disk in any browser with no
server and no network. Every page carries the caution that automated flags assist expert
QC and that the data programme's standards prevail.
"""

from __future__ import annotations

import contextlib
import datetime as _dt
import json
import math
import os
import shutil
import tempfile
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd

from qcflag._version import __version__
from qcflag.exceptions import OutputExistsError, QCFlagError
from qcflag.report.palette import GRADE_STYLES
from qcflag.report.summary import (
    CATEGORIES,
    CAUTION,
    CruiseData,
    confusion_matrix,
    counts_table_rows,
    cruise_data,
    flag_counts,
)

if TYPE_CHECKING:
    from qcflag.profiles import ProfileBatch
    from qcflag.report.figures import Bathymetry
    from qcflag.result import FlagResult

__all__ = ["build_cruise_page", "move_into_place", "to_jsonable", "write_reports"]

MAX_DISAGREEMENT_ROWS = 200
"""Disagreements listed on a page (highest review score first); the JSON keeps them all."""


# --------------------------------------------------------------------------- JSON helpers
def to_jsonable(obj: Any) -> Any:
    """Convert numpy/pandas values to plain JSON types (NaN and NaT become ``None``)."""
    if isinstance(obj, dict):
        return {str(k): to_jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple, set)):
        return [to_jsonable(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return to_jsonable(obj.tolist())
    if isinstance(obj, (bool, np.bool_)):
        return bool(obj)
    if isinstance(obj, (int, np.integer)):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        f = float(obj)
        return f if math.isfinite(f) else None
    if obj is None or isinstance(obj, str):
        return obj
    if isinstance(obj, (pd.Timestamp, _dt.datetime, _dt.date)):
        return None if pd.isna(obj) else obj.isoformat()
    if isinstance(obj, Path):
        return str(obj)
    with contextlib.suppress(TypeError, ValueError):
        if pd.isna(obj):
            return None
    return str(obj)


def _dumps(obj: Any, *, indent: int | None = None) -> str:
    return json.dumps(to_jsonable(obj), indent=indent, allow_nan=False, ensure_ascii=False)


def _tojson_script(obj: Any) -> Any:
    """JSON for a ``<script type="application/json">`` block (no ``<``, ``>``, ``&``)."""
    from markupsafe import Markup

    text = _dumps(obj).replace("<", "\\u003c").replace(">", "\\u003e").replace("&", "\\u0026")
    return Markup(text)  # escaped above; JSON must not be HTML-escaped


def _environment() -> Any:
    import jinja2

    env = jinja2.Environment(
        loader=jinja2.PackageLoader("qcflag.report", "templates"),
        autoescape=True,
        undefined=jinja2.StrictUndefined,
        trim_blocks=True,
        lstrip_blocks=True,
    )
    env.filters["tojson_script"] = _tojson_script
    return env


# --------------------------------------------------------------------------- inputs
def _rules_info(rules: object, result: FlagResult) -> tuple[str, str]:
    """(name, text) of the rule set given as a RuleSet, a name, or None.

    With None, the name recorded in the model card is shown (without the text), else
    "not recorded".
    """
    if rules is None:
        recorded = (result.model_card or {}).get("rules")
        return (f"{recorded} (as recorded in the model card)" if recorded
                else "not recorded"), ""
    if isinstance(rules, (str, os.PathLike)):
        from qcflag.rules import load_rules

        rules = load_rules(str(rules))
    return str(getattr(rules, "name", rules)), str(getattr(rules, "text", "") or "")


CV_METRICS = ("mae", "qwk", "recall_bad", "false_alarm_rate", "roc_auc", "pr_auc")
"""Cross-validation scores shown from a model card (mean and spread over folds)."""

_CARD_SKIP = {"cv", "holdout", "fusion", "training_data", "packages", "caution"}


def _fmt_value(v: Any) -> str:
    if isinstance(v, (float, np.floating)):
        return f"{float(v):.4g}"
    if isinstance(v, (list, tuple)):
        if not v:
            return "none"
        return ", ".join(_fmt_value(x) for x in v[:20]) + (", ..." if len(v) > 20 else "")
    if isinstance(v, dict):
        text = "; ".join(f"{k}: {_fmt_value(x)}" for k, x in v.items())
        return text if len(text) <= 300 else text[:297] + "..."
    return str(v)


def _model_rows(card: dict[str, Any] | None, limit: int = 40) -> list[tuple[str, str]]:
    """Summarise a model card as (key, value) rows for a two-column table.

    Scalars are shown as they are; the training data, the calibration and the package
    versions are condensed; cross-validation scores go to :func:`_cv_rows` and the
    (large) fitted calibration parameters are summarised by their model weight only.
    """
    card = card or {}
    rows: list[tuple[str, str]] = []
    for k, v in card.items():
        if k in _CARD_SKIP:
            continue
        if k == "rules_digest" and isinstance(v, str):
            v = v[:12]
        rows.append((str(k), _fmt_value(v)))
    td = card.get("training_data")
    if isinstance(td, dict):
        rows.extend((f"training data: {k}", _fmt_value(td[k]))
                    for k in ("n_cruises", "n_profiles", "n_levels", "holdout_cruises")
                    if k in td)
        by_grade = td.get("labelled_levels_by_grade")
        if isinstance(by_grade, dict):
            for var, counts in by_grade.items():
                rows.append((f"training labels: {var}", _fmt_value(counts)))
    fusion = card.get("fusion")
    if isinstance(fusion, dict):
        for var, f in fusion.items():
            w = f.get("model_weight") if isinstance(f, dict) else None
            text = "fitted" + (f" (model weight {_fmt_value(w)})" if w is not None else "")
            rows.append((f"calibration: {var}", text))
    if isinstance(card.get("packages"), dict):
        rows.append(("packages", _fmt_value(card["packages"])))
    if card.get("caution"):
        rows.append(("caution", str(card["caution"])))
    return rows[:limit]


def _cv_rows(card: dict[str, Any] | None) -> list[dict[str, str]]:
    """Cross-validation summary rows (variable, model, "mean ± sd" per metric)."""
    cv = (card or {}).get("cv")
    rows: list[dict[str, str]] = []
    if not isinstance(cv, dict):
        return rows
    for var, models in cv.items():
        if not isinstance(models, dict):
            continue
        for model, metrics in models.items():
            if not isinstance(metrics, dict):
                continue
            row = {"variable": str(var), "model": str(model)}
            for m in CV_METRICS:
                v = metrics.get(m)
                if isinstance(v, dict) and v.get("mean") is not None:
                    sd = v.get("sd")
                    row[m] = _fmt(v["mean"], 3) + (f" \u00b1 {_fmt(sd, 3)}" if sd is not None
                                                   and np.isfinite(sd) else "")
                else:
                    row[m] = ""
            rows.append(row)
    return rows


def _load_bathymetry() -> Bathymetry | None:
    from qcflag.report.figures import packaged_bathymetry

    try:
        return packaged_bathymetry()
    except (ImportError, AttributeError, QCFlagError, OSError, KeyError, StopIteration):
        return None  # the map is still drawn, labelled as having no bathymetry


# --------------------------------------------------------------------------- one cruise
def _short_labels(ids: list[str], cruise: str) -> list[str]:
    """Profile ids without a leading cruise name (``AT-101/007`` -> ``007``) for map labels."""
    out = []
    for pid in ids:
        rest = pid[len(cruise):].lstrip("_-/.: ") if pid.startswith(cruise) else ""
        out.append(rest or pid)
    return out


def _fmt(x: Any, digits: int) -> str:
    try:
        f = float(x)
    except (TypeError, ValueError):
        return "" if x is None else str(x)
    return "" if not math.isfinite(f) else f"{f:.{digits}f}"


def build_cruise_page(
    cd: CruiseData,
    *,
    bathymetry: Bathymetry | None,
    scheme: str,
    model_card: dict[str, Any] | None,
    rules_name: str,
    rules_text: str,
    checks_run: list[str],
    generated: str,
    env: Any = None,
) -> tuple[str, dict[str, Any], dict[str, Any]]:
    """Draw one cruise's figures and render its page.

    Returns
    -------
    html : str
        The page.
    figure_data : dict
        What each figure drew (also embedded in the page as ``#figure-data``).
    summary : dict
        The machine-readable summary written as ``<cruise>.json``.
    """
    from qcflag.report.figures import (
        figure_to_data_uri,
        new_figure,
        plot_profile_figure,
        plot_station_map,
        plot_ts_diagram,
    )

    env = env or _environment()
    b = cd.batch
    ids = b.profiles["profile_id"].astype(str).tolist()
    lon_p = b.profiles["longitude"].to_numpy(dtype=float)
    lat_p = b.profiles["latitude"].to_numpy(dtype=float)
    map_fig = new_figure(7.5, 5.6, left=0.09, right=0.83, bottom=0.09, top=0.98)
    smap = plot_station_map(lon_p, lat_p, _short_labels(ids, cd.cruise),
                            cd.worst_auto_per_profile(),
                            bathymetry=bathymetry, ax=map_fig.subplots())
    map_png = figure_to_data_uri(map_fig, dpi=90)

    plot_vars = [v for v in ("temperature", "salinity") if v in cd.auto]
    ts_grade = np.zeros(b.n_levels, dtype=np.int64)
    for v in plot_vars:
        ts_grade = np.maximum(ts_grade, cd.auto[v])
    ts_fig = new_figure(5.5, 4.6, left=0.13, right=0.97, bottom=0.11, top=0.93)
    ts = plot_ts_diagram(b.salinity, b.temperature, b.pressure, b.per_level("longitude"),
                         b.per_level("latitude"), ts_grade, ax=ts_fig.subplots())
    ts_png = figure_to_data_uri(ts_fig, dpi=90)

    times = pd.to_datetime(b.profiles["time"])
    off = b.offsets
    profile_figs = []
    fig_profiles: dict[str, Any] = {}
    for i, pid in enumerate(ids):  # one figure per profile; levels are vectorised inside
        sl = slice(int(off[i]), int(off[i + 1]))
        fig, plots = plot_profile_figure(
            b.pressure[sl],
            {v: (b.values(v)[sl], cd.auto[v][sl], cd.manual[v][sl]) for v in plot_vars},
            title=f"profile {pid}",
        )
        anchor = cd.anchors[i]
        profile_figs.append({
            "anchor": anchor,
            "profile_id": pid,
            "n_levels": int(off[i + 1] - off[i]),
            "time": "" if pd.isna(times.iloc[i]) else times.iloc[i].strftime("%Y-%m-%d %H:%M"),
            "position": f"{_fmt(lat_p[i], 3)}\u00b0N {_fmt(lon_p[i], 3)}\u00b0E",
            "png": figure_to_data_uri(fig, dpi=84),
        })
        fig_profiles[anchor] = {"profile_id": pid,
                                **{v: p.to_dict() for v, p in plots.items()}}

    anchor_of = dict(zip(ids, cd.anchors, strict=True))
    dis = cd.disagreements
    dis_rows = []
    for r in dis.head(MAX_DISAGREEMENT_ROWS).to_dict("records"):
        pid = str(r["profile_id"])
        dis_rows.append({
            "profile_id": pid,
            "anchor": anchor_of.get(pid, ""),
            "level": "" if pd.isna(r["level"]) else int(r["level"]),
            "pressure": _fmt(r["pressure"], 1),
            "variable": r["variable"],
            "value": _fmt(r["value"], 4),
            "manual_grade": int(r["manual_grade"]) if pd.notna(r["manual_grade"]) else 0,
            "auto_grade": int(r["auto_grade"]) if pd.notna(r["auto_grade"]) else 0,
            "confidence": _fmt(r["confidence"], 2),
            "reasons": "" if pd.isna(r["reasons"]) else str(r["reasons"]).replace(";", "; "),
        })

    ptab = cd.profile_table()
    confusion = {v: confusion_matrix(cd.manual[v], cd.auto[v]) for v in cd.auto}
    conf_nested = {v: {gi: {ga: int(m.loc[gi, ga]) for ga in CATEGORIES} for gi in CATEGORIES}
                   for v, m in confusion.items()}
    period = ""
    if len(times) and times.notna().any():
        period = f"{times.min():%Y-%m-%d} to {times.max():%Y-%m-%d}"

    figure_data = {
        "cruise": cd.cruise,
        "palette": {str(g): {"label": s.label, "colour": s.colour, "marker": s.marker,
                             "symbol": s.symbol} for g, s in GRADE_STYLES.items()},
        "map": smap.to_dict(),
        "ts_diagram": ts.to_dict(),
        "profiles": fig_profiles,
    }
    html = env.get_template("cruise.html.j2").render(
        c=cd, n=cd.numbers, period=period, scheme=scheme, caution=CAUTION,
        styles=GRADE_STYLES, categories=CATEGORIES, map=smap, map_png=map_png,
        ts=ts, ts_png=ts_png, profile_rows=ptab.to_dict("records"), profile_vars=plot_vars,
        count_vars=list(cd.auto),
        counts={v: {r["grade"]: r for r in rows} for v, rows in _group_counts(cd).items()},
        confusion=conf_nested, dis_rows=dis_rows,
        profile_figs=profile_figs, model_rows=_model_rows(model_card), cv_rows=_cv_rows(model_card),
        cv_metrics=CV_METRICS, rules_name=rules_name,
        rules_text=rules_text, checks_run=checks_run, figure_data=figure_data,
        version=__version__, generated=generated,
    )
    summary = {
        "cruise": cd.cruise,
        "qcflag_version": __version__,
        "generated": generated,
        "scheme": scheme,
        "caution": CAUTION,
        "time_start": times.min() if len(times) else None,
        "time_end": times.max() if len(times) else None,
        "numbers": cd.numbers,
        "flag_counts": {
            v: {
                ("none" if g == 0 else str(g)): {"auto": int(fc.loc[g, "auto"]),
                                                 "manual": int(fc.loc[g, "manual"])}
                for g in CATEGORIES
            }
            for v, fc in ((v, flag_counts(cd.auto[v], cd.manual[v])) for v in cd.auto)
        },
        "confusion": {
            v: {"rows": "manual", "columns": "auto",
                "categories": ["none" if g == 0 else str(g) for g in CATEGORIES],
                "counts": m.to_numpy().tolist()}
            for v, m in confusion.items()
        },
        "profiles": ptab.drop(columns="anchor").to_dict("records"),
        "disagreements": dis.to_dict("records"),
        "model_card": model_card or {},
        "rules": {"name": rules_name, "checks_run": checks_run},
    }
    return html, figure_data, summary


def _group_counts(cd: CruiseData) -> dict[str, list[dict[str, Any]]]:
    out: dict[str, list[dict[str, Any]]] = {}
    for r in counts_table_rows(cd):
        out.setdefault(r["variable"], []).append(r)
    return out


# --------------------------------------------------------------------------- all cruises
def write_reports(
    batch: ProfileBatch,
    result: FlagResult,
    *,
    out_dir: str | os.PathLike[str],
    audit_table: pd.DataFrame | None = None,
    model_card: dict[str, Any] | None = None,
    rules: object = None,
    overwrite: bool = False,
) -> list[Path]:
    """Write one self-contained HTML page and one JSON summary per cruise, plus an index.

    The directory is built in a temporary directory beside `out_dir` and renamed into
    place at the end, so an interrupted run leaves no half-written report behind.

    Parameters
    ----------
    batch : ProfileBatch
        The flagged profiles, with their manual flags where they have any.
    result : FlagResult
        Automatic flags of `batch` (from :func:`qcflag.pipeline.flag_batch`).
    out_dir : path-like
        Directory to create: ``index.html``, ``index.json``, ``<cruise>.html`` and
        ``<cruise>.json`` (cruise names made file-safe).
    audit_table : pandas.DataFrame, optional
        Output of :func:`qcflag.audit.audit`; computed here when omitted and the batch has
        manual flags.
    model_card : dict, optional
        Summary of the model used; defaults to ``result.model_card``.
    rules : RuleSet or str, optional
        The rule set used (object with ``name`` and ``text``, or a name for
        :func:`qcflag.rules.load_rules`); shown on every page.
    overwrite : bool, default=False
        Replace an existing `out_dir`.

    Returns
    -------
    list of Path
        The files written, index first.

    Raises
    ------
    OutputExistsError
        If `out_dir` exists and `overwrite` is false.
    QCFlagError
        If `result` does not match `batch`.
    """
    out = Path(out_dir)
    if out.exists() and not overwrite:
        raise OutputExistsError(f"{out}: output exists; pass --overwrite to replace it")
    if out.exists() and not out.is_dir():
        raise OutputExistsError(f"{out}: exists and is not a directory; choose another --out")
    for name, vf in result.variables.items():
        if len(vf.grade) != batch.n_levels:
            raise QCFlagError(
                f"{name} flags: {len(vf.grade)} levels for a batch of {batch.n_levels}; "
                "flag this batch before reporting it"
            )
    if audit_table is None and batch.flags:
        from qcflag.audit import audit

        audit_table = audit(batch, result)
    card = dict(result.model_card) if model_card is None else dict(model_card)
    rules_name, rules_text = _rules_info(rules, result)
    checks_run = sorted({c for (c, _) in result.checks.results}) if result.checks else []
    generated = _dt.datetime.now(_dt.UTC).strftime("%Y-%m-%d %H:%M UTC")
    env = _environment()
    bathy = _load_bathymetry()
    cruises = cruise_data(batch, result, audit_table)

    out.parent.mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(prefix=f".{out.name}.tmp-", dir=out.parent))
    try:
        names: list[str] = []
        for cd in cruises:
            html, _, summary = build_cruise_page(
                cd, bathymetry=bathy, scheme=result.scheme, model_card=card,
                rules_name=rules_name, rules_text=rules_text, checks_run=checks_run,
                generated=generated, env=env,
            )
            (tmp / f"{cd.slug}.html").write_text(html, encoding="utf-8")
            (tmp / f"{cd.slug}.json").write_text(_dumps(summary, indent=1), encoding="utf-8")
            names += [f"{cd.slug}.html", f"{cd.slug}.json"]
        total = {"n_profiles": batch.n_profiles, "n_levels": batch.n_levels}
        index_data = {
            "qcflag_version": __version__, "generated": generated, "scheme": result.scheme,
            "caution": CAUTION, "rules": rules_name,
            "model": card.get("name") or card.get("estimator"),
            "cruises": [{"cruise": c.cruise, "page": f"{c.slug}.html",
                         "summary": f"{c.slug}.json", **c.numbers} for c in cruises],
        }
        html = env.get_template("index.html.j2").render(
            cruises=cruises, total=total, scheme=result.scheme, rules_name=rules_name,
            model_name=index_data["model"], caution=CAUTION, figure_data=index_data,
            version=__version__, generated=generated,
        )
        (tmp / "index.html").write_text(html, encoding="utf-8")
        (tmp / "index.json").write_text(_dumps(index_data, indent=1), encoding="utf-8")
        for p in tmp.iterdir():
            os.chmod(p, 0o644)
        os.chmod(tmp, 0o755)
        move_into_place(tmp, out, overwrite=overwrite)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    return [out / "index.html", out / "index.json", *(out / n for n in names)]


def move_into_place(tmp: Path, out: Path, *, overwrite: bool) -> None:
    """Rename the finished `tmp` directory to `out` (replacing it only if `overwrite`)."""
    if not out.exists():
        os.rename(tmp, out)
        return
    if not overwrite:
        raise OutputExistsError(f"{out}: output appeared while writing; not replaced")
    trash = Path(tempfile.mkdtemp(prefix=f".{out.name}.old-", dir=out.parent))
    os.rename(out, trash / out.name)
    os.rename(tmp, out)
    shutil.rmtree(trash, ignore_errors=True)
