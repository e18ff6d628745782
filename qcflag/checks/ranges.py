"""Global and regional range checks (Argo real-time tests 6 and 7).

Limits are inclusive: a value equal to a limit passes (the Argo manual's wording "in range"
does not spell this out; ../shared/reference/qc-standards.md §7 suggests inclusive limits).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import TYPE_CHECKING, Any

import numpy as np

from qcflag.checks._ragged import exceedance, grade_levels, inside_polygon, profile_levels
from qcflag.checks.base import CheckResult

if TYPE_CHECKING:
    from qcflag.profiles import ProfileBatch

__all__ = ["global_range", "regional_range"]


def global_range(
    batch: ProfileBatch,
    *,
    variable: str,
    minimum: float | None = None,
    maximum: float | None = None,
    suspect_at_or_below: float | None = None,
    also_flag: Sequence[str] = (),
) -> CheckResult | dict[str, CheckResult]:
    """Grade values outside fixed limits (Argo test 6, global range).

    Parameters
    ----------
    batch : ProfileBatch
        Profiles to check.
    variable : {"pressure", "temperature", "salinity"}
        Variable to check.
    minimum, maximum : float, optional
        Inclusive limits, in the variable's units; a value outside gets grade 4.
    suspect_at_or_below : float, optional
        A value at or below this (but not below `minimum`) gets grade 3. The Argo pressure
        rule: PRES < -5 dbar is bad, -5 <= PRES <= -2.4 dbar probably bad.
    also_flag : sequence of str
        Other variables that take the same grade at the same level (Argo grades TEMP and
        PSAL with PRES).

    Returns
    -------
    CheckResult or dict of str to CheckResult
        Statistic: signed distance beyond the limits, in the variable's units (negative
        inside, i.e. the margin to the nearest limit; positive outside). With
        `suspect_at_or_below` the lower limit of the statistic is that value. A dict keyed by
        variable when `also_flag` is given.
    """
    v = batch.values(variable)
    lower = suspect_at_or_below if suspect_at_or_below is not None else minimum
    stat = exceedance(v, lower, maximum)
    bad = np.zeros(v.size, dtype=bool) if minimum is None else v < minimum
    if maximum is not None:
        bad |= v > maximum
    grade = grade_levels(v == v, bad)  # comparisons with NaN are False
    if suspect_at_or_below is not None:
        suspect = v <= suspect_at_or_below
        suspect &= ~bad
        grade += suspect.view(np.int8) * np.int8(2)  # 1 -> 3
    result = CheckResult(stat, grade)
    if not also_flag:
        return result
    out = {variable: result}
    for other in also_flag:
        w = batch.values(other)
        out[other] = CheckResult(stat.copy(), grade * (w == w).view(np.int8))
    return out


def regional_range(
    batch: ProfileBatch,
    *,
    variable: str,
    regions: Sequence[Mapping[str, Any]],
) -> CheckResult:
    """Grade values outside the limits of the region a profile lies in (Argo test 7).

    Parameters
    ----------
    batch : ProfileBatch
        Profiles to check.
    variable : {"temperature", "salinity"}
        Variable to check.
    regions : sequence of mapping
        Each with ``polygon`` (list of ``[latitude, longitude]`` vertices, degrees),
        ``minimum`` and/or ``maximum`` (inclusive limits) and optionally ``name``.

    Returns
    -------
    CheckResult
        Grade 4 outside the limits of a region containing the profile, 1 inside them, 0 for
        profiles in no region. Statistic: signed distance beyond the region's limits (as in
        :func:`global_range`), NaN outside every region.
    """
    v = batch.values(variable)
    lat = batch.profiles["latitude"].to_numpy(dtype=np.float64)
    lon = batch.profiles["longitude"].to_numpy(dtype=np.float64)
    stat = np.full(v.size, np.nan)
    grade = np.zeros(v.size, dtype=np.int8)
    for region in regions:  # a handful of regions, each vectorised over all profiles
        inside = inside_polygon(lat, lon, np.asarray(region["polygon"], dtype=np.float64))
        sel = profile_levels(batch, np.flatnonzero(inside))  # levels of those profiles only
        sel = sel[~np.isnan(v[sel])]
        d = exceedance(v[sel], region.get("minimum"), region.get("maximum"))
        g = np.where(d > 0, 4, 1).astype(np.int8)
        stat[sel] = np.fmax(stat[sel], d)
        grade[sel] = np.maximum(grade[sel], g)
    return CheckResult(stat, grade)
