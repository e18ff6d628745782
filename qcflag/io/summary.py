"""What is in a batch: the numbers ``qcflag inspect`` prints."""

from __future__ import annotations

from typing import Any

import numpy as np

from qcflag.profiles import LEVEL_VARIABLES, ProfileBatch
from qcflag.schemes import Grade, State

__all__ = ["summarize"]


def summarize(batch: ProfileBatch) -> dict[str, Any]:
    """Summarise a batch: sizes, cruises, units, pressure range, manual flags by grade.

    Parameters
    ----------
    batch : ProfileBatch
        The batch.

    Returns
    -------
    dict
        JSON-ready: ``files``, ``profiles``, ``levels``, ``cruises`` (name -> profiles),
        ``variables`` (name -> units), ``pressure_min``/``pressure_max`` (dbar, None if no
        finite pressure), ``flag_scheme`` and ``flags`` (variable -> count per grade name or
        state name; ``no_flag`` for levels without one).
    """
    p = batch.pressure[np.isfinite(batch.pressure)]
    cruises = batch.profiles["cruise"].astype(str).value_counts(sort=False)
    flags: dict[str, dict[str, int]] = {}
    for v in LEVEL_VARIABLES:
        if v not in batch.flags:
            continue
        grade, state = batch.manual_grade(v)
        counts: dict[str, int] = {}
        for g in Grade:
            n = int(((state == State.ASSESSED) & (grade == g)).sum())
            if n:
                counts[g.name.lower()] = n
        for s in State:
            if s == State.ASSESSED:
                continue
            n = int((state == s).sum())
            if n:
                counts["no_flag" if s == State.ABSENT else s.name.lower()] = n
        flags[v] = counts
    return {
        "files": len(batch.attrs.get("sources", [])),
        "profiles": batch.n_profiles,
        "levels": batch.n_levels,
        "cruises": {str(k): int(n) for k, n in cruises.items()},
        "variables": dict(batch.units),
        "pressure_min": float(p.min()) if p.size else None,
        "pressure_max": float(p.max()) if p.size else None,
        "flag_scheme": batch.scheme,
        "flags": flags,
        "notes": list(batch.attrs.get("notes", [])),
    }


def format_summary(info: dict[str, Any]) -> str:
    """Plain-text rendering of :func:`summarize` output, one fact per line."""
    lines = [
        f"files:     {info['files']}",
        f"profiles:  {info['profiles']}",
        f"levels:    {info['levels']}",
        f"cruises:   {len(info['cruises'])} ("
        + ", ".join(f"{k}: {n} profiles" for k, n in list(info["cruises"].items())[:10])
        + (", ..." if len(info["cruises"]) > 10 else "") + ")",
        "variables: " + ", ".join(f"{k} [{u}]" for k, u in info["variables"].items()),
    ]
    if info["pressure_min"] is None:
        lines.append("pressure:  no finite values")
    else:
        lines.append(f"pressure:  {info['pressure_min']:g} to {info['pressure_max']:g} dbar")
    lines.append(f"manual flags ({info['flag_scheme']}):"
                 + ("" if info["flags"] else " none"))
    for v, counts in info["flags"].items():
        lines.append(f"  {v}: " + ", ".join(f"{k} {n}" for k, n in counts.items()))
    lines.extend(f"note: {n}" for n in info["notes"])
    return "\n".join(lines)
