"""A straightforward per-profile, per-level loop implementation of qcflag's own checks.

This is the baseline the vectorised checks are timed against (bench/bench_checks.py) and
an independent second implementation the tests compare them with. It follows the same
definitions (see the docstrings in qcflag/checks/) written the plain way: one Python loop
over profiles, Python loops over the levels of each profile, and ``gsw`` called once per
profile. It implements the same step order and the same Argo flag policy (levels graded 4
are not used as neighbours by later neighbour-based steps).

Only qcflag's own checks are implemented here; steps of other checks (the reference-data
checks) raise ``NotImplementedError`` — filter them out of the rule set first.
"""

from __future__ import annotations

import math
from typing import Any

import gsw
import numpy as np

from qcflag.checks.base import CheckResult, CheckTable
from qcflag.rules import RuleSet, load_rules

NAN = math.nan
MAD_TO_SD = 1.4826


def _exceed(v: float, lo: float | None, hi: float | None) -> float:
    if v != v:
        return NAN
    a = -math.inf if lo is None else lo - v
    b = -math.inf if hi is None else v - hi
    return max(a, b)


def _inside(lat: float, lon: float, poly: list[list[float]]) -> bool:
    inside = False
    n = len(poly)
    for k in range(n):
        ya, xa = poly[k]
        yb, xb = poly[(k + 1) % n]
        if ya == yb:
            continue
        if (ya > lat) != (yb > lat) and lon < xa + (lat - ya) * (xb - xa) / (yb - ya):
            inside = not inside
    return inside


def _prev_next(vals: list[float], ok: list[bool]) -> tuple[list[int], list[int]]:
    n = len(vals)
    prev, nxt = [-1] * n, [-1] * n
    last = -1
    for i in range(n):
        prev[i] = last
        if ok[i]:
            last = i
    last = -1
    for i in range(n - 1, -1, -1):
        nxt[i] = last
        if ok[i]:
            last = i
    return prev, nxt


def _ok(vals: list[float], excl: list[bool]) -> list[bool]:
    return [v == v and not e for v, e in zip(vals, excl, strict=True)]


# ---------------------------------------------------------------- one profile, one check
def _global_range(prof: dict, var: str, excl: list[bool], minimum=None, maximum=None,
                  suspect_at_or_below=None, also_flag=()) -> dict[str, tuple[list, list]]:
    vals = prof[var]
    lower = suspect_at_or_below if suspect_at_or_below is not None else minimum
    stat, grade = [], []
    for v in vals:
        stat.append(_exceed(v, lower, maximum))
        if v != v:
            grade.append(0)
        elif (minimum is not None and v < minimum) or (maximum is not None and v > maximum):
            grade.append(4)
        elif suspect_at_or_below is not None and v <= suspect_at_or_below:
            grade.append(3)
        else:
            grade.append(1)
    out = {var: (stat, grade)}
    for other in also_flag:
        out[other] = (list(stat), [0 if o != o else g for o, g in
                                   zip(prof[other], grade, strict=True)])
    return out


def _regional_range(prof: dict, var: str, excl: list[bool], regions=()) -> dict:
    vals = prof[var]
    stat, grade = [NAN] * len(vals), [0] * len(vals)
    for region in regions:
        if not _inside(prof["lat"], prof["lon"], region["polygon"]):
            continue
        for i, v in enumerate(vals):
            if v != v:
                continue
            d = _exceed(v, region.get("minimum"), region.get("maximum"))
            stat[i] = d if stat[i] != stat[i] else max(stat[i], d)
            grade[i] = max(grade[i], 4 if d > 0 else 1)
    return {var: (stat, grade)}


def _pressure_increasing(prof: dict, var: str, excl: list[bool]) -> dict:
    p = prof["pressure"]
    stat, grade = [], []
    runmax = None
    for i, v in enumerate(p):
        if v == v and runmax is not None:
            s = runmax - v
            stat.append(s)
            grade.append(4 if s >= 0 else 1)
        else:
            stat.append(NAN)
            grade.append(0 if v != v else 1)
        if v == v and not excl[i]:
            runmax = v if runmax is None else max(runmax, v)
    out = {"pressure": (stat, grade)}
    for name in ("temperature", "salinity"):
        out[name] = (list(stat), [0 if x != x else g for x, g in
                                  zip(prof[name], grade, strict=True)])
    return out


def _by_pressure(prof: dict, stat: list[float], shallow: float, deep: float,
                 bp: float) -> list[int]:
    grade = []
    for s, p in zip(stat, prof["pressure"], strict=True):
        if s != s or p != p:
            grade.append(0)
        else:
            grade.append(4 if s > (shallow if p < bp else deep) else 1)
    return grade


def _spike_like(prof: dict, var: str, excl: list[bool], shallow_limit: float,
                deep_limit: float, breakpoint: float = 500.0, *, spike: bool) -> dict:
    vals = prof[var]
    prev, nxt = _prev_next(vals, _ok(vals, excl))
    stat = []
    for i, v2 in enumerate(vals):
        if prev[i] < 0 or nxt[i] < 0 or v2 != v2:
            stat.append(NAN)
            continue
        v1, v3 = vals[prev[i]], vals[nxt[i]]
        s = abs(v2 - (v3 + v1) / 2)
        if spike:
            s = s - abs((v3 - v1) / 2)
        stat.append(s)
    return {var: (stat, _by_pressure(prof, stat, shallow_limit, deep_limit, breakpoint))}


def _digit_rollover(prof: dict, var: str, excl: list[bool], limit: float) -> dict:
    vals = prof[var]
    prev, _ = _prev_next(vals, _ok(vals, excl))
    stat, grade = [], []
    for i, v in enumerate(vals):
        s = abs(v - vals[prev[i]]) if prev[i] >= 0 and v == v else NAN
        stat.append(s)
        grade.append(0 if s != s else (4 if s > limit else 1))
    return {var: (stat, grade)}


def _stuck_value(prof: dict, var: str, excl: list[bool], min_levels: int = 2) -> dict:
    vals = prof[var]
    good = [v for v, o in zip(vals, _ok(vals, excl), strict=True) if o]
    spread = max(good) - min(good) if len(good) >= min_levels else NAN
    stat = [spread] * len(vals)
    grade = [0 if (spread != spread or v != v) else (4 if spread == 0 else 1) for v in vals]
    return {var: (stat, grade)}


def _flat_line(prof: dict, var: str, excl: list[bool], eps: float = 0.0,
               suspect_count: int = 10, fail_count: int = 20) -> dict:
    vals = prof[var]
    idx = [i for i, o in enumerate(_ok(vals, excl)) if o]
    stat = [NAN] * len(vals)
    k = 0
    while k < len(idx):
        j = k
        while j + 1 < len(idx) and abs(vals[idx[j + 1]] - vals[idx[j]]) <= eps:
            j += 1
        for m in range(k, j + 1):
            stat[idx[m]] = float(j - k + 1)
        k = j + 1
    grade = []
    for s in stat:
        if s != s:
            grade.append(0)
        else:
            grade.append(4 if s >= fail_count + 1 else 3 if s >= suspect_count + 1 else 1)
    return {var: (stat, grade)}


def _density_inversion(prof: dict, var: str, excl: list[bool], threshold: float = 0.03
                       ) -> dict:
    t, s, p = prof["temperature"], prof["salinity"], prof["pressure"]
    lat, lon = prof["lat"], prof["lon"]
    n = len(t)
    ok = [t[i] == t[i] and not excl[i] and s[i] == s[i] and p[i] == p[i]
          and lat == lat and lon == lon for i in range(n)]
    use = [i for i in range(n) if ok[i]]
    stat = [NAN] * n
    if use:
        ta, sa, pa = (np.array([x[i] for i in use]) for x in (t, s, p))
        SA = gsw.SA_from_SP(sa, pa, np.full(len(use), lon), np.full(len(use), lat))
        CT = gsw.CT_from_t(SA, ta, pa)
        keep = [k for k in range(len(use)) if SA[k] == SA[k] and CT[k] == CT[k]]
        up, lo = keep[:-1], keep[1:]
        p_mid = (pa[up] + pa[lo]) / 2  # gsw once per profile, as a plain script would
        drops = (gsw.rho(SA[up], CT[up], p_mid) - gsw.rho(SA[lo], CT[lo], p_mid)).tolist()
        for a, b, drop in zip(up, lo, drops, strict=True):
            i, j = use[a], use[b]
            stat[i] = drop if stat[i] != stat[i] else max(stat[i], drop)
            stat[j] = drop if stat[j] != stat[j] else max(stat[j], drop)
    grade = [0 if x != x else (4 if x > threshold else 1) for x in stat]
    return {name: (list(stat), [0 if v != v else g for v, g in zip(prof[name], grade,
                                                                      strict=True)])
            for name in ("temperature", "salinity")}


def _median(xs: list[float]) -> float:
    xs = sorted(xs)
    c = len(xs)
    return (xs[(c - 1) // 2] + xs[c // 2]) / 2


def _robust_z(prof: dict, var: str, excl: list[bool], half_window: int = 5,
              min_scale: float = 0.01) -> dict:
    vals = prof[var]
    ok = _ok(vals, excl)
    n = len(vals)
    stat = []
    for i in range(n):
        win = [vals[j] for j in range(max(0, i - half_window), min(n, i + half_window + 1))
               if ok[j]]
        if len(win) < 3 or vals[i] != vals[i]:
            stat.append(NAN)
            continue
        med = _median(win)
        mad = _median([abs(w - med) for w in win])
        stat.append((vals[i] - med) / max(MAD_TO_SD * mad, min_scale))
    return {var: (stat, [0] * n)}


def _second_difference(prof: dict, var: str, excl: list[bool]) -> dict:
    vals = prof[var]
    prev, nxt = _prev_next(vals, _ok(vals, excl))
    stat = [vals[prev[i]] - 2 * v + vals[nxt[i]] if prev[i] >= 0 and nxt[i] >= 0 else NAN
            for i, v in enumerate(vals)]
    return {var: (stat, [0] * len(vals))}


def _edge(prof: dict, var: str, excl: list[bool], deepest: bool) -> dict:
    vals, p = prof[var], prof["pressure"]
    ok = [v == v and q == q for v, q in zip(vals, p, strict=True)]
    present = [q for q, o in zip(p, ok, strict=True) if o]
    edge = (max(present) if deepest else min(present)) if present else NAN
    stat = [abs(q - edge) if o else NAN for q, o in zip(p, ok, strict=True)]
    return {var: (stat, [0] * len(vals))}


LOOP_CHECKS: dict[str, Any] = {
    "global_range": _global_range,
    "regional_range": _regional_range,
    "pressure_increasing": _pressure_increasing,
    "spike": lambda prof, var, excl, **kw: _spike_like(prof, var, excl, spike=True, **kw),
    "gradient": lambda prof, var, excl, **kw: _spike_like(prof, var, excl, spike=False, **kw),
    "digit_rollover": _digit_rollover,
    "stuck_value": _stuck_value,
    "flat_line": _flat_line,
    "density_inversion": _density_inversion,
    "robust_z": _robust_z,
    "second_difference": _second_difference,
    "near_surface": lambda prof, var, excl: _edge(prof, var, excl, deepest=False),
    "near_bottom": lambda prof, var, excl: _edge(prof, var, excl, deepest=True),
}
NEIGHBOURS_FROM = {
    "pressure_increasing": ("pressure",),
    "density_inversion": ("temperature", "salinity"),
    "spike": (), "gradient": (), "digit_rollover": (), "stuck_value": (), "flat_line": (),
    "robust_z": (), "second_difference": (),
}


def own_steps(rules: str | RuleSet | None = None) -> RuleSet:
    """The rule set without the steps this module does not implement."""
    rs = load_rules(rules)
    steps = [s for s in rs.steps if s.check in LOOP_CHECKS]
    return RuleSet(name=rs.name, path=rs.path, text=rs.text, steps=steps, summary=rs.summary)


def run_checks_loop(batch: Any, rules: str | RuleSet | None = None) -> CheckTable:
    """Run a rule set profile by profile, level by level; same results as run_checks."""
    rs = load_rules(rules)
    names = ("pressure", "temperature", "salinity")
    out_stat: dict[tuple[str, str], list[float]] = {}
    out_grade: dict[tuple[str, str], list[int]] = {}
    owned: dict[tuple[str, str], bool] = {}
    lats = batch.profiles["latitude"].to_numpy(dtype=float)
    lons = batch.profiles["longitude"].to_numpy(dtype=float)
    for k in range(batch.n_profiles):
        a, b = int(batch.offsets[k]), int(batch.offsets[k + 1])
        prof = {name: batch.values(name)[a:b].tolist() for name in names}
        prof["lat"], prof["lon"] = float(lats[k]), float(lons[k])
        excluded = {name: [False] * (b - a) for name in names}
        per_key: dict[tuple[str, str], tuple[list[float], list[int]]] = {}
        own_keys: set[tuple[str, str]] = set()
        for step in rs.steps:
            func = LOOP_CHECKS.get(step.check)
            if func is None:
                raise NotImplementedError(f"loop implementation has no {step.check!r}")
            src = NEIGHBOURS_FROM.get(step.check)
            excl = [False] * (b - a)
            if src is not None:
                for v in src or (step.variable,):
                    excl = [x or y for x, y in zip(excl, excluded[v], strict=True)]
            res = func(prof, step.variable, excl, **step.params)
            multi = step.check in ("pressure_increasing", "density_inversion")
            for var, (stat, grade) in res.items():
                if not step.verdict:
                    grade = [0] * len(grade)
                key = (step.check, var)
                own = var == step.variable or multi
                if key in per_key:
                    ostat, ograde = per_key[key]
                    if own and key not in own_keys:
                        nstat = stat
                    elif own:
                        nstat = [y if x != x else (x if y != y else max(x, y))
                                 for x, y in zip(ostat, stat, strict=True)]
                    else:
                        nstat = ostat
                    grade = [max(x, y) for x, y in zip(ograde, grade, strict=True)]
                    stat = nstat
                per_key[key] = (stat, grade)
                if own:
                    own_keys.add(key)
                if step.verdict:
                    excluded[var] = [e or g == 4 for e, g in zip(excluded[var], grade,
                                                                 strict=True)]
        for key, (stat, grade) in per_key.items():
            out_stat.setdefault(key, []).extend(stat)
            out_grade.setdefault(key, []).extend(grade)
            owned[key] = True
    results = {key: CheckResult(np.array(out_stat[key], dtype=float),
                                np.array(out_grade[key], dtype=np.int8)) for key in out_stat}
    return CheckTable(results, batch.n_levels)
