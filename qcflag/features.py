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
``rule_grade_pressure``         Worst rule grade of pressure at the level.
``rule_grade_other``            Worst rule grade of the other variable (salinity for
                                temperature and vice versa).
``rule_grade``                  Worst rule grade of the judged variable (1, 3 or 4;
                                always the last column).
==============================  ====================================================

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

__all__ = ["FEATURE_SET_VERSION", "JUDGED_VARIABLES", "build_features", "window_robust_z"]

FEATURE_SET_VERSION: int = 1
"""Version of the feature definitions; recorded with every model."""

JUDGED_VARIABLES: tuple[str, ...] = ("temperature", "salinity")
"""Variables a model grades."""

WINDOW_HALF = 3
MAD_FLOOR = 0.005


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
    cols["rule_grade_pressure"] = checks.verdict("pressure").astype(np.float64)
    cols["rule_grade_other"] = checks.verdict(other).astype(np.float64)
    cols["rule_grade"] = checks.verdict(variable).astype(np.float64)
    names = list(cols)
    X = np.empty((n, len(names)), dtype=np.float64)
    for j, name in enumerate(names):
        X[:, j] = cols[name]
    return X, names
