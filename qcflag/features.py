"""Per-level feature matrix for learning graded flags.

:func:`build_features` turns a :class:`~qcflag.checks.base.CheckTable` and its batch into a
matrix ``X`` of shape ``(n_levels, n_features)`` (float64, NaN where a value does not apply;
the learning pipelines impute it) for one judged variable, ``"temperature"`` or
``"salinity"``. Everything is vectorised over the flat ragged batch. Columns, in order:

==============================  ====================================================
column                          meaning
==============================  ====================================================
``<variable>_<check>``          Every check statistic in the table (all variables,
                                also the climatology anomalies and any robust
                                z-scores the rule set computes), sorted by name.
``pressure``                    Sea pressure, dbar.
``log_pressure``                ``log10(1 + pressure)``.
``relative_position``           Level index / (levels in profile - 1); 0 at the top,
                                1 at the bottom (0.5 for single-level profiles).
``dT_dp``                       Central vertical derivative of temperature,
                                degC/dbar; NaN at profile ends and across gaps.
``dS_dp``                       Same for practical salinity, 1/dbar.
``<variable>_window_z``         Robust z-score of the judged variable in a window of
                                7 levels: ``(x - median) / (1.4826 MAD)``, with the
                                MAD floored at 0.005 (degC or PSS-78; our choice) to
                                avoid dividing by zero in mixed layers. Left out when
                                the rule set already gives ``<variable>_robust_z``.
``profile_n_levels``            Number of levels in the level's profile.
``profile_max_abs_z``           Largest ``|z|`` in the profile, ``z`` being the
                                check's ``<variable>_robust_z`` where present, else
                                ``<variable>_window_z``.
``profile_n_fired``             Levels of the profile where a check gave the judged
                                variable grade >= 3.
``profile_fired_fraction``      ``profile_n_fired / profile_n_levels``.
``n_checks_fired``              Checks giving this level grade >= 3 for the variable.
``instrument_ctd``              1 if the profile's ``instrument`` is ``"ctd"``, 0 if
                                known and different, NaN if unknown.
``instrument_float``            Same for ``"float"``.
``<variable>_cruise_dev``       Level value minus the median, over the profiles of
                                the same cruise, of their mean value in the same
                                25-dbar pressure bin (NaN where fewer than three
                                profiles share the bin): what a person sees
                                overlaying a cruise's casts.
``profile_cruise_dev_deep``     Profile median of ``<variable>_cruise_dev`` over its
                                deep levels (see below): a whole-profile offset or
                                a drifting sensor stands out from the cruise.
``profile_abs_cruise_dev_deep`` Its absolute value.
``profile_clim_z_deep``         Profile median of the climatology z-score of the
                                judged variable over its deep levels (wrong
                                position or date, whole-profile offsets); NaN
                                without a climatology check.
``profile_km_from_cruise``      Distance (km, equirectangular) of the profile's
                                position from the cruise's median position.
``profile_days_from_cruise``    ``log10(1 + |days|)`` between the profile's time and
                                the cruise's median time.
``other_missing``               1 where the other variable's value is missing (its
                                checks, derivatives and density cannot be formed),
                                else 0.
``rule_grade_pressure``         Worst rule grade of pressure at the level.
``rule_grade_other``            Worst rule grade of the other variable (salinity for
                                temperature and vice versa).
``rule_grade``                  Worst rule grade of the judged variable (1, 3 or 4;
                                always the last column).
==============================  ====================================================

*Deep levels* of a profile are those at or below ``min(300 dbar, half its deepest
pressure)``, where variability between casts is smallest. Cruise groups come from
``profiles["cruise"]`` (the whole batch is one group without it); every group statistic is
a vectorised sort-and-reduce, with no loop over profiles or levels.

Which check statistics appear depends on the rule set, so a model records its feature names
and refuses a matrix whose names differ. :data:`FEATURE_SET_VERSION` changes whenever the
meaning or order of the context columns changes.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np

if TYPE_CHECKING:
    from numpy.typing import NDArray

    from qcflag.checks.base import CheckTable
    from qcflag.profiles import ProfileBatch

__all__ = [
    "FEATURE_SET_VERSION",
    "JUDGED_VARIABLES",
    "build_features",
    "cruise_deviation",
    "deep_levels",
    "group_median",
    "window_robust_z",
]

FEATURE_SET_VERSION: int = 2
"""Version of the feature definitions; recorded with every model."""

JUDGED_VARIABLES: tuple[str, ...] = ("temperature", "salinity")
"""Variables a model grades."""

WINDOW_HALF = 3
MAD_FLOOR = 0.005
CRUISE_BIN = 25.0  # dbar
DEEP_PRESSURE = 300.0  # dbar


def group_median(keys: NDArray[np.int64], values: NDArray[np.float64]
                 ) -> tuple[NDArray[np.int64], NDArray[np.float64], NDArray[np.int64]]:
    """Median of `values` per distinct key (NaN values ignored), by one sort.

    Parameters
    ----------
    keys : ndarray of int64
        Group key of each value.
    values : ndarray of float64
        Values.

    Returns
    -------
    uniq : ndarray of int64
        Distinct keys with at least one finite value, sorted.
    median : ndarray of float64
        Median per key.
    count : ndarray of int64
        Finite values per key.
    """
    ok = np.isfinite(values)
    k, v = keys[ok], values[ok]
    if k.size == 0:
        return np.zeros(0, np.int64), np.zeros(0), np.zeros(0, np.int64)
    order = np.lexsort((v, k))
    k, v = k[order], v[order]
    uniq, start, count = np.unique(k, return_index=True, return_counts=True)
    med = 0.5 * (v[start + (count - 1) // 2] + v[start + count // 2])
    return uniq, med, count


def _lookup(uniq: NDArray[np.int64], table: NDArray[np.float64], keys: NDArray[np.int64]
            ) -> NDArray[np.float64]:
    """``table`` value of each key (NaN where the key is absent)."""
    if uniq.size == 0:
        return np.full(keys.size, np.nan)
    pos = np.clip(np.searchsorted(uniq, keys), 0, uniq.size - 1)
    return np.where(uniq[pos] == keys, table[pos], np.nan)


def _cruise_codes(batch: ProfileBatch) -> NDArray[np.int64]:
    if "cruise" not in batch.profiles.columns:
        return np.zeros(batch.n_profiles, dtype=np.int64)
    c = batch.profiles["cruise"].astype(str).to_numpy()
    return np.unique(c, return_inverse=True)[1].astype(np.int64).reshape(-1)


def deep_levels(batch: ProfileBatch) -> NDArray[np.bool_]:
    """Levels at or below ``min(300 dbar, half the profile's deepest pressure)``."""
    p = np.where(np.isfinite(batch.pressure), batch.pressure, -np.inf)
    pmax = _profile_max(batch, p)
    cut = np.minimum(DEEP_PRESSURE, 0.5 * np.nan_to_num(pmax, nan=np.inf))
    return batch.pressure >= cut[batch.profile_index]


def cruise_deviation(batch: ProfileBatch, x: NDArray[np.float64],
                     cruise: NDArray[np.int64] | None = None, *,
                     coord: NDArray[np.float64] | None = None,
                     width: float = CRUISE_BIN) -> NDArray[np.float64]:
    """Level value minus the cruise median of per-profile bin means at its pressure bin.

    Pressure (or `coord`, e.g. temperature for salinity on isotherms) is binned in `width`
    units (default :data:`CRUISE_BIN` dbar); each profile contributes its mean value per
    bin; the median is over the profiles of the cruise with a value in that bin (NaN where
    fewer than three).
    """
    n = batch.n_levels
    if n == 0:
        return np.zeros(0)
    cr = _cruise_codes(batch) if cruise is None else cruise
    c = batch.pressure if coord is None else coord
    fin = np.isfinite(c)
    lo = float(np.min(c[fin])) if fin.any() else 0.0
    with np.errstate(invalid="ignore"):
        b = np.floor((np.where(fin, c, lo) - lo) / width).astype(np.int64)
    b = np.clip(b, 0, 1_000_000)
    nb = int(b.max()) + 1
    pi = batch.profile_index
    unit = pi * nb + b
    ok = np.isfinite(x) & fin
    uu, inv = np.unique(unit[ok], return_inverse=True)
    sums = np.bincount(inv, weights=x[ok], minlength=uu.size)
    cnt = np.bincount(inv, minlength=uu.size)
    means = sums / cnt
    gkey = cr[uu // nb] * nb + uu % nb
    gu, gmed, gcnt = group_median(gkey, means)
    gmed = np.where(gcnt >= 3, gmed, np.nan)
    med = _lookup(gu, gmed, cr[pi] * nb + b)
    return np.where(fin, x - med, np.nan)


def _profile_median(batch: ProfileBatch, x: NDArray[np.float64],
                    mask: NDArray[np.bool_]) -> NDArray[np.float64]:
    """Per-profile median of `x` over `mask` levels (NaN where none)."""
    keys = batch.profile_index.astype(np.int64)
    uniq, med, _ = group_median(keys[mask], x[mask])
    return _lookup(uniq, med, np.arange(batch.n_profiles, dtype=np.int64))


def _position_time_context(batch: ProfileBatch, cruise: NDArray[np.int64]
                           ) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Per-profile distance (km) and log10(1 + |days|) from the cruise's median."""
    prof = batch.profiles
    nprof = batch.n_profiles
    km = np.full(nprof, np.nan)
    days = np.full(nprof, np.nan)
    if nprof == 0:
        return km, days
    if {"latitude", "longitude"} <= set(prof.columns):
        lat = prof["latitude"].to_numpy(dtype=np.float64)
        lon = prof["longitude"].to_numpy(dtype=np.float64)
        u, mlat, _ = group_median(cruise, lat)
        _, mlon, _ = group_median(cruise, lon)
        clat, clon = _lookup(u, mlat, cruise), _lookup(u, mlon, cruise)
        dx = (lon - clon) * np.cos(np.radians(0.5 * (lat + clat)))
        km = 111.2 * np.hypot(lat - clat, dx)
    if "time" in prof.columns:
        import pandas as pd

        t = pd.to_datetime(prof["time"], errors="coerce")
        d = (t.to_numpy().astype("datetime64[s]").astype(np.float64)
             / 86400.0)
        d = np.where(t.isna().to_numpy(), np.nan, d)
        u, med, _ = group_median(cruise, d)
        days = np.log10(1.0 + np.abs(d - _lookup(u, med, cruise)))
    return km, days


def _profile_sum(batch: ProfileBatch, values: NDArray[np.float64]) -> NDArray[np.float64]:
    csum = np.concatenate([[0.0], np.cumsum(values)])
    return csum[batch.offsets[1:]] - csum[batch.offsets[:-1]]


def _profile_max(batch: ProfileBatch, values: NDArray[np.float64]) -> NDArray[np.float64]:
    """Per-profile nanmax (NaN for empty or all-NaN profiles)."""
    out = np.full(batch.n_profiles, -np.inf)
    v = np.where(np.isnan(values), -np.inf, values)
    np.maximum.at(out, batch.profile_index, v)
    return np.where(np.isneginf(out), np.nan, out)


def _central_derivative(batch: ProfileBatch, x: NDArray[np.float64]) -> NDArray[np.float64]:
    n = batch.n_levels
    out = np.full(n, np.nan)
    if n < 3:
        return out
    inner = ~(batch.first_level | batch.last_level)
    i = np.flatnonzero(inner)
    p = batch.pressure
    dp = p[i + 1] - p[i - 1]
    with np.errstate(divide="ignore", invalid="ignore"):
        d = (x[i + 1] - x[i - 1]) / dp
    out[i] = np.where(dp > 0, d, np.nan)
    return out


def window_robust_z(
    batch: ProfileBatch, x: NDArray[np.float64], *, half: int = WINDOW_HALF,
    floor: float = MAD_FLOOR,
) -> NDArray[np.float64]:
    """Robust z-score of each level within a window of ``2 * half + 1`` levels of its profile.

    Parameters
    ----------
    batch : ProfileBatch
        Gives the profile boundaries.
    x : ndarray of shape (n_levels,)
        Values; NaN levels are ignored in the window statistics.
    half : int, default=3
        Half-width of the window, levels.
    floor : float, default=0.005
        Lower bound of the MAD, in the units of `x`.

    Returns
    -------
    ndarray of shape (n_levels,)
        ``(x - median) / (1.4826 * max(MAD, floor))``; NaN where `x` is NaN or the window
        holds fewer than three values.
    """
    n = batch.n_levels
    if n == 0:
        return np.zeros(0)
    shifts = np.arange(-half, half + 1)
    lvl = batch.level_index[:, None] + shifts[None, :]
    inside = (lvl >= 0) & (lvl < batch.counts[batch.profile_index][:, None])
    idx = np.clip(np.arange(n)[:, None] + shifts[None, :], 0, n - 1)
    win = np.where(inside, x[idx], np.nan)
    # median of the non-NaN entries: sort (NaN last) and pick the middle
    win.sort(axis=1)
    cnt = np.sum(~np.isnan(win), axis=1)
    rows = np.arange(n)
    lo = np.maximum((cnt - 1) // 2, 0)
    hi = np.maximum(cnt // 2, 0)
    med = 0.5 * (win[rows, lo] + win[rows, hi])
    dev = np.abs(win - med[:, None])
    dev.sort(axis=1)
    mad = 0.5 * (dev[rows, lo] + dev[rows, hi])
    z = (x - med) / (1.4826 * np.maximum(mad, floor))
    return np.where(cnt >= 3, z, np.nan)


def _instrument(batch: ProfileBatch) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    n = batch.n_levels
    if "instrument" not in batch.profiles.columns:
        return np.full(n, np.nan), np.full(n, np.nan)
    raw = batch.profiles["instrument"].astype("string").str.strip().str.lower()
    known = raw.notna() & (raw != "")
    ctd = np.where(known, (raw == "ctd").fillna(False), np.nan).astype(np.float64)
    flt = np.where(known, (raw == "float").fillna(False), np.nan).astype(np.float64)
    return ctd[batch.profile_index], flt[batch.profile_index]


def build_features(
    batch: ProfileBatch, checks: CheckTable, variable: str
) -> tuple[NDArray[np.float64], list[str]]:
    """Build the per-level feature matrix of one judged variable.

    Parameters
    ----------
    batch : ProfileBatch
        The profiles the checks ran on.
    checks : CheckTable
        Results of :func:`qcflag.rules.run_checks` on `batch`.
    variable : {"temperature", "salinity"}
        Variable whose grade the features describe.

    Returns
    -------
    X : ndarray of float64, shape (n_levels, n_features)
        Features (columns in the module docstring's order); NaN where not applicable.
    names : list of str
        Column names.

    Raises
    ------
    ValueError
        If `variable` is not judged or `checks` does not match the batch.
    """
    if variable not in JUDGED_VARIABLES:
        raise ValueError(f"variable must be one of {JUDGED_VARIABLES}, got {variable!r}")
    n = batch.n_levels
    if checks.n_levels != n:
        raise ValueError(f"check table has {checks.n_levels} levels, batch has {n}")
    other = "salinity" if variable == "temperature" else "temperature"
    cols: dict[str, NDArray[np.float64]] = {}
    stats = checks.statistics()
    for name in sorted(stats):
        s = np.asarray(stats[name], dtype=np.float64)
        cols[name] = np.where(np.isfinite(s), s, np.nan)
    p = batch.pressure
    cols["pressure"] = p
    with np.errstate(invalid="ignore"):
        cols["log_pressure"] = np.log10(1.0 + np.where(p > -1.0, p, np.nan))
    span = (batch.counts - 1)[batch.profile_index].astype(np.float64)
    cols["relative_position"] = np.divide(
        batch.level_index.astype(np.float64), span, out=np.full(n, 0.5), where=span > 0)
    cols["dT_dp"] = _central_derivative(batch, batch.temperature)
    cols["dS_dp"] = _central_derivative(batch, batch.salinity)
    if f"{variable}_robust_z" in cols:
        z = cols[f"{variable}_robust_z"]
    else:
        z = window_robust_z(batch, batch.values(variable))
        cols[f"{variable}_window_z"] = z
    count = batch.counts.astype(np.float64)
    cols["profile_n_levels"] = count[batch.profile_index]
    cols["profile_max_abs_z"] = _profile_max(batch, np.abs(z))[batch.profile_index]
    names_fired, mask = checks.fired_mask(variable)
    n_fired_level = np.zeros(n)
    for i in range(len(names_fired)):  # loop over checks (a handful), not levels
        n_fired_level += (mask >> i) & 1
    any_fired = (mask != 0).astype(np.float64)
    prof_fired = _profile_sum(batch, any_fired)
    cols["profile_n_fired"] = prof_fired[batch.profile_index]
    cols["profile_fired_fraction"] = np.divide(
        prof_fired, count, out=np.zeros_like(count), where=count > 0)[batch.profile_index]
    cols["n_checks_fired"] = n_fired_level
    cols["instrument_ctd"], cols["instrument_float"] = _instrument(batch)
    cruise = _cruise_codes(batch)
    pi = batch.profile_index
    deep = deep_levels(batch)
    dev = cruise_deviation(batch, batch.values(variable), cruise)
    cols[f"{variable}_cruise_dev"] = dev
    pdev = _profile_median(batch, dev, deep)[pi]
    cols["profile_cruise_dev_deep"] = pdev
    cols["profile_abs_cruise_dev_deep"] = np.abs(pdev)
    clim = stats.get(f"{variable}_climatology")
    if clim is not None:
        cz = np.asarray(clim, dtype=np.float64)
        cols["profile_clim_z_deep"] = _profile_median(batch, cz, deep)[pi]
    else:
        cols["profile_clim_z_deep"] = np.full(n, np.nan)
    km, days = _position_time_context(batch, cruise)
    cols["profile_km_from_cruise"] = km[pi]
    cols["profile_days_from_cruise"] = days[pi]
    cols["other_missing"] = (~np.isfinite(batch.values(other))).astype(np.float64)
    cols["rule_grade_pressure"] = checks.verdict("pressure").astype(np.float64)
    cols["rule_grade_other"] = checks.verdict(other).astype(np.float64)
    cols["rule_grade"] = checks.verdict(variable).astype(np.float64)
    names = list(cols)
    X = np.empty((n, len(names)), dtype=np.float64)
    for j, name in enumerate(names):
        X[:, j] = cols[name]
    return X, names
