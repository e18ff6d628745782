"""Numbers behind the reports: flag counts, confusion matrices, headline figures per cruise.

Everything here is plain numpy/pandas on the flat level arrays of a batch; nothing draws.
The same numbers fill the HTML tables and the machine-readable ``<cruise>.json`` summary.
"""

from __future__ import annotations

import re
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd

from qcflag.report.palette import GRADE_STYLES, NO_GRADE
from qcflag.schemes import State, profile_quality

if TYPE_CHECKING:
    from numpy.typing import NDArray

    from qcflag.profiles import ProfileBatch
    from qcflag.result import FlagResult

__all__ = [
    "CATEGORIES",
    "CruiseData",
    "confusion_matrix",
    "cruise_data",
    "cruise_slugs",
    "disagreements",
    "flag_counts",
    "grade_category",
    "headline",
]

CATEGORIES: tuple[int, ...] = (1, 2, 3, 4, NO_GRADE)
"""Row/column order of count tables: grades 1-4, then "no grade"."""

CAUTION = (
    "Automated flags assist expert quality control; they do not replace it. These flags are "
    "suggestions for a data manager to review, and the data programme's own QC standards and "
    "its experts' decisions prevail wherever they differ."
)
"""The caution printed on every report page and stored in every JSON summary."""


def grade_category(grade: NDArray[np.integer], state: NDArray[np.integer]) -> NDArray[np.int64]:
    """Grade 1-4 where the level was assessed, else 0 ("no grade").

    Parameters
    ----------
    grade, state : ndarray of int, shape (n,)
        Grade and :class:`~qcflag.schemes.State` per level.

    Returns
    -------
    ndarray of int64
    """
    g = np.asarray(grade, dtype=np.int64)
    s = np.asarray(state, dtype=np.int64)
    return np.where((s == State.ASSESSED) & (g >= 1) & (g <= 4), g, NO_GRADE)


def _category_pos(cat: NDArray[np.int64]) -> NDArray[np.int64]:
    # position of each category in CATEGORIES: grades 1-4 -> 0-3, no grade -> 4
    return np.where(cat == NO_GRADE, 4, cat - 1)


def flag_counts(auto: NDArray[np.int64], manual: NDArray[np.int64]) -> pd.DataFrame:
    """Count levels per grade category, automatic and manual side by side.

    Parameters
    ----------
    auto, manual : ndarray of int, shape (n,)
        Grade category per level (see :func:`grade_category`).

    Returns
    -------
    pandas.DataFrame
        Index: :data:`CATEGORIES`; columns ``auto`` and ``manual``.
    """
    a = np.bincount(_category_pos(np.asarray(auto)), minlength=5)
    m = np.bincount(_category_pos(np.asarray(manual)), minlength=5)
    return pd.DataFrame({"auto": a, "manual": m}, index=pd.Index(CATEGORIES, name="grade"))


def confusion_matrix(manual: NDArray[np.int64], auto: NDArray[np.int64]) -> pd.DataFrame:
    """Cross-tabulate manual (rows) against automatic (columns) grade categories.

    Returns
    -------
    pandas.DataFrame
        5 x 5 counts, index and columns :data:`CATEGORIES`.
    """
    m = _category_pos(np.asarray(manual))
    a = _category_pos(np.asarray(auto))
    counts = np.bincount(m * 5 + a, minlength=25).reshape(5, 5)
    return pd.DataFrame(
        counts,
        index=pd.Index(CATEGORIES, name="manual"),
        columns=pd.Index(CATEGORIES, name="auto"),
    )


def headline(auto: dict[str, NDArray[np.int64]], manual: dict[str, NDArray[np.int64]],
             n_disagreements: int) -> dict[str, Any]:
    """Headline numbers of a set of levels.

    Parameters
    ----------
    auto, manual : dict of str to ndarray
        Grade category per level for each variable (same variables, same length).
    n_disagreements : int
        Rows of the audit's disagreement list.

    Returns
    -------
    dict
        ``percent_flagged_auto`` / ``percent_flagged_manual``: share of levels where any
        variable is graded 3 or worse (percent of levels); ``agreement_exact``: share of
        (level, variable) pairs graded by both where the grades are equal;
        ``agreement_pass_fail``: share where both sit on the same side of the good (1-2) /
        bad (3-4) divide; ``n_compared``: number of such pairs; ``n_disagreements``.
        Percentages are NaN (``None`` in JSON) where nothing counts.
    """
    names = list(auto)
    n = len(next(iter(auto.values()))) if names else 0
    worst_a = np.zeros(n, dtype=np.int64)
    worst_m = np.zeros(n, dtype=np.int64)
    both = exact = side = 0
    for v in names:
        a, m = auto[v], manual[v]
        worst_a = np.maximum(worst_a, a)
        worst_m = np.maximum(worst_m, m)
        sel = (a > 0) & (m > 0)
        both += int(sel.sum())
        exact += int((a[sel] == m[sel]).sum())
        side += int(((a[sel] >= 3) == (m[sel] >= 3)).sum())
    has_manual = any((manual[v] > 0).any() for v in names)
    return {
        "percent_flagged_auto": _pct(int((worst_a >= 3).sum()), n),
        "percent_flagged_manual": _pct(int((worst_m >= 3).sum()), n) if has_manual else None,
        "agreement_exact": _pct(exact, both),
        "agreement_pass_fail": _pct(side, both),
        "n_compared": both,
        "n_disagreements": int(n_disagreements),
    }


def _pct(k: int, n: int) -> float | None:
    return round(100.0 * k / n, 2) if n else None


def disagreements(audit_table: pd.DataFrame | None) -> pd.DataFrame:
    """Rows of an audit table where automatic and manual grades differ, worst first.

    Rows where either side has no ordinal grade are kept only if the other side is graded
    3 or worse (an automatic "bad" on a level the expert left unflagged is worth a look).
    Sorted by ``score`` (when present) then grade gap, descending.
    """
    cols = ["profile_id", "cruise", "level", "pressure", "variable", "value", "manual_grade",
            "auto_grade", "confidence", "grade_gap", "score", "reasons"]
    if audit_table is None or len(audit_table) == 0:
        return pd.DataFrame(columns=cols)
    t = audit_table
    a = pd.to_numeric(t["auto_grade"], errors="coerce").fillna(0).to_numpy()
    m = pd.to_numeric(t["manual_grade"], errors="coerce").fillna(0).to_numpy()
    keep = ((a > 0) & (m > 0) & (a != m)) | ((a == 0) & (m >= 3)) | ((m == 0) & (a >= 3))
    out = t.loc[keep].copy()
    for c in cols:
        if c not in out.columns:
            out[c] = np.nan if c not in ("reasons", "variable", "profile_id") else ""
    key = []
    if out["score"].notna().any():
        key.append("score")
    out["_gap"] = np.abs(pd.to_numeric(out["grade_gap"], errors="coerce").fillna(
        pd.Series(a[keep] - m[keep], index=out.index)))
    key.append("_gap")
    out = out.sort_values(key, ascending=False, kind="stable").drop(columns="_gap")
    return out[cols].reset_index(drop=True)


def cruise_slugs(names: list[str]) -> dict[str, str]:
    """Safe, unique file stems for cruise names (``[A-Za-z0-9._-]``; never ``index``)."""
    out: dict[str, str] = {}
    used = {"index"}
    for name in names:
        base = re.sub(r"[^A-Za-z0-9._-]+", "_", str(name)).strip("._") or "cruise"
        slug, k = base, 2
        while slug.lower() in used:
            slug, k = f"{base}-{k}", k + 1
        used.add(slug.lower())
        out[name] = slug
    return out


def _html_id(text: str) -> str:
    return re.sub(r"[^A-Za-z0-9_-]+", "_", str(text))


@dataclass
class CruiseData:
    """One cruise's slice of a batch, its flags and its numbers.

    Attributes
    ----------
    cruise, slug : str
        Cruise name and its file stem.
    batch : ProfileBatch
        The cruise's profiles.
    auto, manual : dict of str to ndarray
        Grade category per level of the cruise, per variable.
    confidence : dict of str to ndarray
        Combiner confidence per level.
    reasons : dict of str to ndarray
        Reasons per level.
    anchors : list of str
        HTML id of each profile's figure (``profile-<id>``), in batch order.
    disagreements : pandas.DataFrame
        Audit rows of this cruise where the grades differ.
    """

    cruise: str
    slug: str
    batch: ProfileBatch
    auto: dict[str, NDArray[np.int64]]
    manual: dict[str, NDArray[np.int64]]
    confidence: dict[str, NDArray[np.float64]]
    reasons: dict[str, NDArray[np.object_]]
    anchors: list[str]
    disagreements: pd.DataFrame
    numbers: dict[str, Any] = field(default_factory=dict)

    def worst_auto_per_profile(self) -> NDArray[np.int64]:
        """Worst automatic grade (0-4) of each profile over all variables."""
        worst = np.zeros(self.batch.n_levels, dtype=np.int64)
        for v in self.auto.values():
            worst = np.maximum(worst, v)
        return _per_profile_max(worst, self.batch.offsets)

    def profile_table(self) -> pd.DataFrame:
        """One row per profile: position, time, levels, Argo table 2a grades, disagreements."""
        b = self.batch
        prof = b.profiles
        tab = pd.DataFrame({
            "profile_id": prof["profile_id"].astype(str).to_numpy(),
            "anchor": self.anchors,
            "time": pd.to_datetime(prof["time"]).dt.strftime("%Y-%m-%d %H:%M").to_numpy(),
            "latitude": prof["latitude"].to_numpy(dtype=float).round(3),
            "longitude": prof["longitude"].to_numpy(dtype=float).round(3),
            "n_levels": b.counts,
            "worst_auto_grade": self.worst_auto_per_profile(),
        })
        for v in ("temperature", "salinity"):
            if v in self.auto:
                cat = self.auto[v]
                state = np.where(cat > 0, State.ASSESSED, State.MISSING)
                pct, letter = profile_quality(cat, state, b.offsets)
                tab[f"{v}_percent_good"] = np.round(pct, 1)
                tab[f"{v}_profile_grade"] = letter
        dis = self.disagreements
        counts = dis["profile_id"].astype(str).value_counts() if len(dis) else pd.Series()
        tab["n_disagreements"] = tab["profile_id"].map(counts).fillna(0).astype(int).to_numpy()
        return tab


def _per_profile_max(values: NDArray[np.int64], offsets: NDArray[np.int64]) -> NDArray[np.int64]:
    n = offsets.size - 1
    out = np.zeros(n, dtype=np.int64)
    nonempty = np.diff(offsets) > 0
    if nonempty.any():
        out[nonempty] = np.maximum.reduceat(values, offsets[:-1][nonempty]) if values.size else 0
    return out


def cruise_data(
    batch: ProfileBatch,
    result: FlagResult,
    audit_table: pd.DataFrame | None,
) -> list[CruiseData]:
    """Split a flagged batch into per-cruise :class:`CruiseData`, in order of appearance.

    Parameters
    ----------
    batch : ProfileBatch
        The flagged profiles (with manual flags, if any).
    result : FlagResult
        Automatic flags of `batch`.
    audit_table : pandas.DataFrame or None
        Output of :func:`qcflag.audit.audit` for `batch` and `result`.

    Returns
    -------
    list of CruiseData
    """
    cruises = batch.profiles["cruise"].astype(str).to_numpy()
    names = list(dict.fromkeys(cruises.tolist()))
    slugs = cruise_slugs(names)
    dis_all = disagreements(audit_table)
    level_cruise = cruises[batch.profile_index] if batch.n_levels else cruises[:0]
    variables = [v for v in ("temperature", "salinity", "pressure") if v in result.variables]
    auto_all = {v: grade_category(result[v].grade, result[v].state) for v in variables}
    manual_all = {}
    for v in variables:
        g, s = batch.manual_grade(v)
        manual_all[v] = grade_category(g, s)
    out = []
    for name in names:  # one pass per cruise (a handful), vectorised within
        pidx = np.flatnonzero(cruises == name)
        lmask = level_cruise == name
        sub = batch.select(pidx)
        ids = sub.profiles["profile_id"].astype(str).tolist()
        dis = dis_all[dis_all["cruise"].astype(str) == name] if "cruise" in dis_all else dis_all
        if len(dis) and "cruise" not in dis_all:
            dis = dis[dis["profile_id"].astype(str).isin(ids)]
        cd = CruiseData(
            cruise=name,
            slug=slugs[name],
            batch=sub,
            auto={v: a[lmask] for v, a in auto_all.items()},
            manual={v: m[lmask] for v, m in manual_all.items()},
            confidence={v: np.asarray(result[v].confidence, dtype=float)[lmask]
                        for v in variables},
            reasons={v: np.asarray(result[v].reasons, dtype=object)[lmask] for v in variables},
            anchors=_unique_anchors(ids),
            disagreements=dis.reset_index(drop=True),
        )
        cd.numbers = {
            "n_profiles": sub.n_profiles,
            "n_levels": sub.n_levels,
            **headline(cd.auto, cd.manual, len(dis)),
        }
        out.append(cd)
    return out


def _unique_anchors(ids: list[str]) -> list[str]:
    seen: set[str] = set()
    out = []
    for pid in ids:
        base = "profile-" + _html_id(pid)
        a, k = base, 2
        while a in seen:
            a, k = f"{base}-{k}", k + 1
        seen.add(a)
        out.append(a)
    return out


def counts_table_rows(cd: CruiseData) -> list[dict[str, Any]]:
    """Rows for the flag-count table: variable, grade, label, symbol, colour, auto, manual."""
    rows = []
    for v in cd.auto:
        fc = flag_counts(cd.auto[v], cd.manual[v])
        for g in CATEGORIES:
            st = GRADE_STYLES[g]
            rows.append({"variable": v, "grade": g, "label": st.label, "symbol": st.symbol,
                         "colour": st.colour, "auto": int(fc.loc[g, "auto"]),
                         "manual": int(fc.loc[g, "manual"])})
    return rows
