"""Vectorised helpers over the ragged batch (flat level arrays + profile offsets).

Every helper works on the whole batch at once: neighbour look-ups are masked at profile
boundaries, "previous valid level" is an index forward-fill with
:func:`numpy.maximum.accumulate`, and moving windows are gathered into a
``(n_levels, window)`` matrix. None of them loops in Python over levels or profiles.
"""

from __future__ import annotations

import functools
import weakref
from collections.abc import Callable
from typing import TYPE_CHECKING, Any

import numpy as np

if TYPE_CHECKING:
    from numpy.typing import NDArray

    from qcflag.profiles import ProfileBatch

_MEMO: weakref.WeakKeyDictionary[Any, dict[Any, Any]] = weakref.WeakKeyDictionary()

__all__ = [
    "broadcast_profiles",
    "exceedance",
    "gather",
    "grade_levels",
    "inside_polygon",
    "moving_median_mad",
    "neighbour_map",
    "next_valid_index",
    "next_values",
    "prev_valid_index",
    "prev_values",
    "profile_levels",
    "profile_reduce",
    "run_lengths",
    "shallower_than",
    "sorted_unique",
    "sorting_network",
    "usable",
]


def usable(values: NDArray[np.float64], exclude: NDArray[np.bool_] | None = None
           ) -> NDArray[np.bool_]:
    """Levels whose value is finite and not excluded (already graded bad by an earlier check).

    Parameters
    ----------
    values : ndarray of float64, shape (n_levels,)
        Level values.
    exclude : ndarray of bool, shape (n_levels,), optional
        Levels an earlier check graded 4; they are not used as neighbours (Argo flag policy).

    Returns
    -------
    ndarray of bool, shape (n_levels,)
    """
    ok = np.isfinite(values)
    if exclude is not None:
        ok &= ~np.asarray(exclude, dtype=bool)
    return ok


def prev_valid_index(batch: ProfileBatch, valid: NDArray[np.bool_]) -> NDArray[np.int64]:
    """Index of the nearest valid level above each level in the same profile, -1 if none.

    Parameters
    ----------
    batch : ProfileBatch
        The batch (for its offsets).
    valid : ndarray of bool, shape (n_levels,)
        Which levels may serve as neighbours.

    Returns
    -------
    ndarray of int64, shape (n_levels,)
        ``j < i`` with ``valid[j]`` and ``j`` in the profile of ``i``, the largest such; -1
        where there is none.

    Notes
    -----
    The answer is ``i - 1`` except at the first level of a profile and just below an invalid
    level; only those few levels are worked out (:func:`_prev_fixes`).
    """
    out = _shifted_index(batch, valid.size, before=True).copy()
    at, src = _prev_fixes(batch, valid)
    out[at] = src
    return out


def next_valid_index(batch: ProfileBatch, valid: NDArray[np.bool_]) -> NDArray[np.int64]:
    """Index of the nearest valid level below each level in the same profile, -1 if none.

    Parameters
    ----------
    batch : ProfileBatch
        The batch (for its offsets).
    valid : ndarray of bool, shape (n_levels,)
        Which levels may serve as neighbours.

    Returns
    -------
    ndarray of int64, shape (n_levels,)
        Smallest ``j > i`` with ``valid[j]`` in the profile of ``i``; -1 where there is none.
    """
    out = _shifted_index(batch, valid.size, before=False).copy()
    at, src = _next_fixes(batch, valid)
    out[at] = src
    return out


def prev_values(batch: ProfileBatch, values: NDArray[np.float64], valid: NDArray[np.bool_]
                ) -> NDArray[np.float64]:
    """Value of the nearest valid level above each level in its profile, NaN if none.

    The same as ``gather(values, prev_valid_index(batch, valid))`` but without building the
    index: the values shifted down by one level, corrected at profile tops and below
    invalid levels.

    Parameters
    ----------
    batch : ProfileBatch
        The batch.
    values : ndarray of float64, shape (n_levels,)
        Level values.
    valid : ndarray of bool, shape (n_levels,)
        Which levels may serve as neighbours.

    Returns
    -------
    ndarray of float64, shape (n_levels,)
        A new array.
    """
    n = values.size
    out = np.empty(n)
    if n == 0:
        return out
    out[0] = np.nan
    out[1:] = values[:-1]
    out[_edge_levels(batch)[0]] = np.nan
    at, src = _prev_fixes(batch, valid)
    out[at] = _take(values, src)
    return out


def next_values(batch: ProfileBatch, values: NDArray[np.float64], valid: NDArray[np.bool_]
                ) -> NDArray[np.float64]:
    """Value of the nearest valid level below each level in its profile, NaN if none.

    The same as ``gather(values, next_valid_index(batch, valid))`` (see :func:`prev_values`).

    Parameters
    ----------
    batch : ProfileBatch
        The batch.
    values : ndarray of float64, shape (n_levels,)
        Level values.
    valid : ndarray of bool, shape (n_levels,)
        Which levels may serve as neighbours.

    Returns
    -------
    ndarray of float64, shape (n_levels,)
        A new array.
    """
    n = values.size
    out = np.empty(n)
    if n == 0:
        return out
    out[-1] = np.nan
    out[:-1] = values[1:]
    out[_edge_levels(batch)[1]] = np.nan
    at, src = _next_fixes(batch, valid)
    out[at] = _take(values, src)
    return out


_LEVEL_BLOCK = 32768
"""Levels per block of :func:`neighbour_map` (its temporaries stay in the CPU cache)."""


def neighbour_map(batch: ProfileBatch, values: NDArray[np.float64], valid: NDArray[np.bool_],
                  func: Callable[[slice | NDArray[np.int64], NDArray[np.float64],
                                  NDArray[np.float64]], None],
                  *, before: bool = True, after: bool = True) -> None:
    """Call ``func(levels, v1, v3)`` so that it sees every level once with its neighbours.

    ``v1`` and ``v3`` are the values of the nearest valid level above and below each of
    ``levels`` in its profile (NaN where there is none; :func:`prev_values`,
    :func:`next_values`). `func` computes its results for ``levels`` elementwise and stores
    them at ``levels`` in its own output arrays; it must not write to ``v1`` or ``v3``.

    The levels are visited in cache-sized blocks (``levels`` a slice) with the adjacent
    levels as neighbours, read in place; afterwards the few levels whose neighbour is not
    adjacent (profile ends, next to invalid levels) are visited again with their true
    neighbours (``levels`` an index array), which overwrites what the first visit stored.
    So no neighbour array is built and the temporaries of `func` stay in the cache.

    Parameters
    ----------
    batch : ProfileBatch
        The batch.
    values : ndarray of float64, shape (n_levels,)
        Level values.
    valid : ndarray of bool, shape (n_levels,)
        Which levels may serve as neighbours.
    func : callable
        ``func(levels, v1, v3) -> None``.
    before, after : bool, default=True
        Whether `func` uses ``v1`` / ``v3`` (the other is then NaN or junk).
    """
    n = values.size
    if n == 0:
        return
    for start in range(1, n - 1, _LEVEL_BLOCK):  # interior levels, adjacent neighbours
        stop = min(start + _LEVEL_BLOCK, n - 1)
        func(slice(start, stop), values[start - 1:stop - 1], values[start + 1:stop + 1])
    top, bottom = _edge_levels(batch)
    parts = [np.array([0, n - 1], dtype=np.int64)]
    fixes = []
    if before:
        at, src = _prev_fixes(batch, valid)
        parts += [top, at]
        fixes.append((at, src))
    if after:
        at, src = _next_fixes(batch, valid)
        parts += [bottom, at]
        fixes.append((at, src))
    redo = sorted_unique(np.concatenate(parts))
    near = []
    for step, ends, use in ((-1, top, before), (1, bottom, after)):
        v = np.full(redo.size, np.nan)
        if use:
            j = redo + step
            inside = (j >= 0) & (j < n)
            v[inside] = values[j[inside]]
            v[np.searchsorted(redo, ends)] = np.nan  # every profile end is in redo
            at, src = fixes[0] if step < 0 else fixes[-1]
            v[np.searchsorted(redo, at)] = _take(values, src)
        near.append(v)
    func(redo, near[0], near[1])


def sorted_unique(a: NDArray[np.int64]) -> NDArray[np.int64]:
    """Sorted distinct values of a small integer array (np.unique without its overheads).

    Parameters
    ----------
    a : ndarray of int64
        Values.

    Returns
    -------
    ndarray of int64
    """
    a = np.sort(a)
    keep = np.ones(a.size, dtype=bool)
    keep[1:] = a[1:] != a[:-1]
    return a[keep]


def _take(values: NDArray[np.float64], index: NDArray[np.int64]) -> NDArray[np.float64]:
    """Return ``values[index]`` with NaN where the index is -1 (for a few indices)."""
    out = values[index]
    out[index < 0] = np.nan
    return out


def _prev_fixes(batch: ProfileBatch, valid: NDArray[np.bool_]
                ) -> tuple[NDArray[np.int64], NDArray[np.int64]]:
    """Levels just below an invalid level, and their nearest valid level above (-1: none).

    For a run of invalid levels ``a..b`` the level ``b + 1`` looks past the run to ``a - 1``,
    unless that is in another profile. Works on the invalid levels only (few).
    """
    bad = np.flatnonzero(~valid)
    if bad.size == 0:
        return bad, bad
    first = np.ones(bad.size, dtype=bool)
    first[1:] = bad[1:] != bad[:-1] + 1
    src = np.maximum.accumulate(np.where(first, bad, 0)) - 1  # above the run of invalids
    at = bad + 1
    if at[-1] == valid.size:
        at, src = at[:-1], src[:-1]
    top = batch.offsets[np.searchsorted(batch.offsets, at, side="right") - 1]
    src[src < top] = -1
    return at, src


def _next_fixes(batch: ProfileBatch, valid: NDArray[np.bool_]
                ) -> tuple[NDArray[np.int64], NDArray[np.int64]]:
    """Levels just above an invalid level, and their nearest valid level below (-1: none)."""
    n = valid.size
    bad = np.flatnonzero(~valid)
    if bad.size == 0:
        return bad, bad
    last = np.ones(bad.size, dtype=bool)
    last[:-1] = bad[1:] != bad[:-1] + 1
    src = np.minimum.accumulate(np.where(last, bad, n)[::-1])[::-1] + 1  # below the run
    at = bad - 1
    if at[0] < 0:
        at, src = at[1:], src[1:]
    end = batch.offsets[np.searchsorted(batch.offsets, at, side="right")]
    src[src >= end] = -1
    return at, src


def _edge_levels(batch: ProfileBatch) -> tuple[NDArray[np.int64], NDArray[np.int64]]:
    """First and last level of each non-empty profile."""
    memo = _memo(batch)
    if "edges" not in memo:
        nonempty = batch.counts > 0
        memo["edges"] = (batch.offsets[:-1][nonempty], batch.offsets[1:][nonempty] - 1)
    return memo["edges"]


def _shifted_index(batch: ProfileBatch, n: int, *, before: bool) -> NDArray[np.int64]:
    """``i - 1`` (`before`) or ``i + 1`` for every level, -1 across a profile boundary."""
    key = ("shifted", before)
    memo = _memo(batch)
    if key not in memo:
        idx = np.arange(-1, n - 1) if before else np.arange(1, n + 1)
        idx[_edge_levels(batch)[0 if before else 1]] = -1
        idx.setflags(write=False)
        memo[key] = idx
    return memo[key]


def _memo(batch: ProfileBatch) -> dict[Any, Any]:
    """Per-batch cache of level geometry (batches are immutable; dropped with the batch)."""
    memo = _MEMO.get(batch)
    if memo is None:
        memo = _MEMO[batch] = {}
    if len(memo) > 32:
        memo.clear()
    return memo


def shallower_than(batch: ProfileBatch, breakpoint: float
                   ) -> tuple[NDArray[np.bool_], NDArray[np.bool_]]:
    """Levels with pressure below `breakpoint`, and levels with a pressure (cached per batch).

    Parameters
    ----------
    batch : ProfileBatch
        The batch.
    breakpoint : float
        Pressure, dbar.

    Returns
    -------
    shallow : ndarray of bool, shape (n_levels,)
        ``pressure < breakpoint`` (False where pressure is missing).
    has_pressure : ndarray of bool, shape (n_levels,)
        ``pressure`` is not NaN.
    """
    memo = _memo(batch)
    key = ("shallower", float(breakpoint))
    if key not in memo:
        p = batch.pressure
        shallow = p < breakpoint
        has_p = p == p
        shallow.setflags(write=False)
        has_p.setflags(write=False)
        memo[key] = (shallow, has_p)
    return memo[key]


def grade_levels(applies: NDArray[np.bool_], fails: NDArray[np.bool_], fail_grade: int = 4
                 ) -> NDArray[np.int8]:
    """Grades of a pass/fail rule: 0 where it does not apply, 1 pass, `fail_grade` fail.

    Parameters
    ----------
    applies : ndarray of bool, shape (n_levels,)
        Levels the rule applies to.
    fails : ndarray of bool, shape (n_levels,)
        Levels that fail it (counted only where it applies).
    fail_grade : int, default=4
        Grade of a failing level.

    Returns
    -------
    ndarray of int8, shape (n_levels,)
    """
    g = np.logical_and(fails, applies).view(np.int8)
    g *= np.int8(fail_grade - 1)
    g += applies.view(np.int8)
    return g


def gather(values: NDArray[np.float64], index: NDArray[np.int64]) -> NDArray[np.float64]:
    """Values at `index`, NaN where the index is -1.

    Parameters
    ----------
    values : ndarray of float64
        Level values.
    index : ndarray of int64
        Indices into `values`; -1 marks "no such level".

    Returns
    -------
    ndarray of float64, same shape as `index`
    """
    ext = np.empty(values.size + 1)
    ext[:-1] = values
    ext[-1] = np.nan  # index -1 lands here
    return ext[index]


def broadcast_profiles(batch: ProfileBatch, per_profile: NDArray) -> NDArray:
    """Repeat a per-profile array to levels, shape (n_levels,)."""
    return np.repeat(np.asarray(per_profile), batch.counts)


def profile_levels(batch: ProfileBatch, profiles: NDArray[np.int64]) -> NDArray[np.int64]:
    """Level indices of the given profiles, in the order given.

    Parameters
    ----------
    batch : ProfileBatch
        The batch.
    profiles : ndarray of int64
        Profile numbers.

    Returns
    -------
    ndarray of int64
        The levels of ``profiles[0]``, then of ``profiles[1]``, ...
    """
    counts = batch.counts[profiles]
    total = int(counts.sum())
    shift = batch.offsets[:-1][profiles] - (np.cumsum(counts) - counts)
    return np.arange(total, dtype=np.int64) + np.repeat(shift, counts)


def profile_reduce(batch: ProfileBatch, values: NDArray[np.float64],
                   valid: NDArray[np.bool_], kind: str | tuple[str, ...]
                   ) -> NDArray[np.float64] | tuple[NDArray[np.float64], ...]:
    """Reduce the valid values of each profile to one number.

    Parameters
    ----------
    batch : ProfileBatch
        The batch.
    values : ndarray of float64, shape (n_levels,)
        Level values.
    valid : ndarray of bool, shape (n_levels,)
        Levels to include.
    kind : {"min", "max", "count"} or tuple of them
        The reduction; a tuple asks for several at once (one pass to mask the values).

    Returns
    -------
    ndarray of float64, shape (n_profiles,), or a tuple of them (one per kind)
        NaN for "min"/"max" of a profile without valid levels (and where the extreme is
        infinite).
    """
    kinds = (kind,) if isinstance(kind, str) else tuple(kind)
    nonempty = np.flatnonzero(batch.counts > 0)
    starts = batch.offsets[:-1][nonempty]
    masked = None
    out: list[NDArray[np.float64]] = []
    for k in kinds:
        if k == "count":
            skipped = np.flatnonzero(~valid)
            drop = np.diff(np.searchsorted(skipped, batch.offsets))
            out.append((batch.counts - drop).astype(np.float64))
            continue
        if k not in ("min", "max"):
            raise ValueError(f"profile_reduce: unknown kind {k!r}")
        if masked is None:
            masked = values if valid.all() else np.where(valid, values, np.nan)
        res = np.full(batch.n_profiles, np.nan)
        if nonempty.size:  # fmin/fmax skip the NaN of invalid levels
            res[nonempty] = (np.fmin if k == "min" else np.fmax).reduceat(masked, starts)
        res[np.isinf(res)] = np.nan
        out.append(res)
    return out[0] if isinstance(kind, str) else tuple(out)


def exceedance(values: NDArray[np.float64], minimum: float | None,
               maximum: float | None) -> NDArray[np.float64]:
    """Signed distance outside ``[minimum, maximum]``: negative inside, positive outside.

    Parameters
    ----------
    values : ndarray of float64
        Values to test.
    minimum, maximum : float or None
        Limits; a missing limit does not bound.

    Returns
    -------
    ndarray of float64
        ``max(minimum - v, v - maximum)``; NaN where `values` is NaN.
    """
    if minimum is None and maximum is None:
        return np.where(np.isnan(values), np.nan, -np.inf)
    if minimum is None:
        return values - maximum
    if maximum is None:
        return minimum - values
    below = np.subtract(minimum, values)
    return np.maximum(below, np.subtract(values, maximum), out=below)  # NaN propagates


def inside_polygon(lat: NDArray[np.float64], lon: NDArray[np.float64],
                   polygon: NDArray[np.float64]) -> NDArray[np.bool_]:
    """Even-odd point-in-polygon test, vectorised over points.

    Parameters
    ----------
    lat, lon : ndarray of float64, shape (n,)
        Points, degrees north and east.
    polygon : ndarray of float64, shape (n_vertices, 2)
        Vertices as (latitude, longitude); closing the ring is optional. Longitudes are
        taken as given (no wrap at the date line).

    Returns
    -------
    ndarray of bool, shape (n,)
        True inside; NaN positions are outside.

    Notes
    -----
    Loops over the polygon's edges only (a handful), never over points.
    """
    poly = np.asarray(polygon, dtype=np.float64)
    y0, x0 = poly[:, 0], poly[:, 1]
    y1, x1 = np.roll(y0, -1), np.roll(x0, -1)
    inside = np.zeros(lat.shape, dtype=bool)
    for ya, xa, yb, xb in zip(y0, x0, y1, x1, strict=True):
        if ya == yb:
            continue  # horizontal edge: never crossed by the horizontal ray
        spans = (ya > lat) != (yb > lat)
        cross_x = xa + (lat - ya) * (xb - xa) / (yb - ya)
        inside ^= spans & (lon < cross_x)
    return inside


def run_lengths(batch: ProfileBatch, same_as_prev: NDArray[np.bool_]
                ) -> tuple[NDArray[np.int64], NDArray[np.int64]]:
    """Length of the run each level belongs to, and its position in that run.

    Parameters
    ----------
    batch : ProfileBatch
        The batch; runs never cross profile boundaries.
    same_as_prev : ndarray of bool, shape (n_levels,)
        True where a level continues the run of the level above it.

    Returns
    -------
    length : ndarray of int64, shape (n_levels,)
        Number of levels in the run.
    position : ndarray of int64, shape (n_levels,)
        1-based position of the level in its run.
    """
    n = same_as_prev.size
    if n == 0:
        return np.zeros(0, np.int64), np.zeros(0, np.int64)
    starts = ~same_as_prev | batch.first_level
    run_id = np.cumsum(starts) - 1
    lengths = np.bincount(run_id)
    start_idx = np.flatnonzero(starts)
    position = np.arange(n, dtype=np.int64) - start_idx[run_id] + 1
    return lengths[run_id].astype(np.int64), position


def moving_median_mad(batch: ProfileBatch, values: NDArray[np.float64],
                      valid: NDArray[np.bool_], half_window: int
                      ) -> tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.int64]]:
    """Median and median absolute deviation in a centred window of levels, per profile.

    The window of level ``i`` holds levels ``i - half_window .. i + half_window`` of the same
    profile that are `valid`. Windows whose every slot is a usable level of the profile (the
    vast majority) are computed exactly from sorted windows built with min/max networks
    over column arrays (:func:`_pair_median_mad`, in cache-sized blocks); the few windows
    cut by a profile end or a gap are gathered into a matrix and sorted row-wise (NaN
    last). No Python loop over levels or profiles.

    Parameters
    ----------
    batch : ProfileBatch
        The batch.
    values : ndarray of float64, shape (n_levels,)
        Level values.
    valid : ndarray of bool, shape (n_levels,)
        Levels allowed in windows.
    half_window : int
        Number of levels on each side.

    Returns
    -------
    median, mad : ndarray of float64, shape (n_levels,)
        NaN where the window holds no valid level. For an even count the median is the mean
        of the two middle values. New arrays (the caller may write to them).
    count : ndarray of int64, shape (n_levels,)
        Valid levels in each window.
    """
    n = values.size
    k = int(half_window)
    w = 2 * k + 1
    if n == 0:
        return np.zeros(0), np.zeros(0), np.zeros(0, dtype=np.int64)
    # usable values, padded with NaN so that every level has a full window view (two spare
    # slots at the end for the pairwise blocks)
    padded = np.full(n + 2 * k + 2, np.nan)
    np.copyto(padded[k:k + n], values, where=valid)
    view = np.lib.stride_tricks.sliding_window_view(padded[:n + 2 * k], w)
    # windows cut by a profile end or holding an unusable level (few): the rest are full
    rest = _cut_windows(batch, valid, k)
    prof = np.searchsorted(batch.offsets, rest, side="right") - 1
    above = rest - batch.offsets[prof]
    below = batch.offsets[prof + 1] - rest - 1
    offs = np.arange(-k, k + 1, dtype=np.int64)
    sub = view[rest].T.copy()  # one row per window slot, one column per cut window
    sub[(offs[:, None] < -above) | (offs[:, None] > below)] = np.nan
    present = sub == sub
    c = np.count_nonzero(present, axis=0)
    count = np.full(n, w, dtype=np.int64)
    count[rest] = c
    if w <= _NETWORK_MAX:
        med, mad = _pair_median_mad(padded, n, k)  # cut windows are redone below
    else:
        full = np.ones(n, dtype=bool)
        full[rest] = False
        med = np.full(n, np.nan)
        mad = np.full(n, np.nan)
        rows = np.flatnonzero(full)
        win = view[rows]
        win.partition(w // 2, axis=1)
        med[rows] = win[:, w // 2]
        win = np.abs(view[rows] - med[rows, None])
        win.partition(w // 2, axis=1)
        mad[rows] = win[:, w // 2]
    if rest.size:  # sort each cut window (missing slots as +inf, last) and pick
        np.copyto(sub, np.inf, where=~present)
        m = _middle(_sort_columns(sub), c)
        med[rest] = m
        np.subtract(sub, m, out=sub)
        np.abs(sub, out=sub)
        mad[rest] = _middle(_sort_columns(sub), c)
    return med, mad, count


def _cut_windows(batch: ProfileBatch, valid: NDArray[np.bool_], k: int) -> NDArray[np.int64]:
    """Return the levels whose window is cut: within `k` of a profile end or invalid level.

    The window ``i - k .. i + k`` of every other level holds ``2k + 1`` valid levels of its
    profile. Sorted level indices.
    """
    n = valid.size
    cut = np.zeros(n, dtype=bool)
    bad = np.flatnonzero(~valid)
    top, bottom = _edge_levels(batch)
    for d in range(-k, k + 1):  # the window's slots, not the levels
        near = bad + d
        cut[near[(near >= 0) & (near < n)]] = True
        if d >= 0:
            cut[(top + d)[top + d <= bottom]] = True
            cut[(bottom - d)[bottom - d >= top]] = True
    return np.flatnonzero(cut)


def _sort_columns(a: NDArray[np.float64]) -> NDArray[np.float64]:
    """Sort each column of `a` (no NaN) in place with a sorting network over its rows."""
    for i, j in sorting_network(a.shape[0]):
        lo = np.minimum(a[i], a[j])
        np.maximum(a[i], a[j], out=a[j])
        a[i] = lo
    return a


_NETWORK_MAX = 31
"""Largest window that uses the sorting networks (larger ones use np.partition)."""

_PAIR_BLOCK = 8192
"""Pairs of windows per block (the block's columns stay in the CPU cache)."""

_SORTING_NETWORKS: dict[int, list[tuple[int, int]]] = {
    # Smallest known comparator networks (common knowledge, e.g. Knuth, TAOCP vol. 3,
    # 5.3.4); tests/test_checks_batch.py proves each one sorts by the 0-1 principle.
    2: [(0, 1)],
    4: [(0, 1), (2, 3), (0, 2), (1, 3), (1, 2)],
    6: [(0, 5), (1, 3), (2, 4), (1, 2), (3, 4), (0, 3), (2, 5), (0, 1), (2, 3), (4, 5),
        (1, 2), (3, 4)],
    8: [(0, 2), (1, 3), (4, 6), (5, 7), (0, 4), (1, 5), (2, 6), (3, 7), (0, 1), (2, 3),
        (4, 5), (6, 7), (2, 4), (3, 5), (1, 4), (3, 6), (1, 2), (3, 4), (5, 6)],
    10: [(0, 8), (1, 9), (2, 7), (3, 5), (4, 6), (0, 2), (1, 4), (5, 8), (7, 9), (0, 3),
         (2, 4), (5, 7), (6, 9), (0, 1), (3, 6), (8, 9), (1, 5), (2, 3), (4, 8), (6, 7),
         (1, 2), (3, 5), (4, 6), (7, 8), (2, 3), (4, 5), (6, 7), (3, 4), (5, 6)],
}


def sorting_network(n: int) -> list[tuple[int, int]]:
    """Return comparators ``(i, j)``, ``i < j``, that sort `n` wires (min to i, max to j).

    Parameters
    ----------
    n : int
        Number of wires.

    Returns
    -------
    list of tuple of int
        The smallest known network for the even sizes up to 10, else Batcher's odd-even
        merge sort.
    """
    return _SORTING_NETWORKS.get(n) or _merge_network(n)


@functools.cache
def _merge_network(n: int) -> list[tuple[int, int]]:
    """Return the comparators of Batcher's odd-even merge sort for `n` wires, in order.

    Built for the next power of two; comparators touching a wire ``>= n`` are dropped, which
    is exact for `n` inputs (the missing wires act as +inf and never move). Built once per
    size (a Python loop over ~100 comparators that every moving-median call needed), and
    shared like the fixed networks above: callers only iterate over it.
    """
    size = 1
    while size < n:
        size *= 2
    out: list[tuple[int, int]] = []
    p = 1
    while p < size:
        kk = p
        while kk >= 1:
            for j in range(kk % p, size - kk, 2 * kk):
                for i in range(min(kk, size - j - kk)):
                    a, b = i + j, i + j + kk
                    if a // (2 * p) == b // (2 * p) and b < n:
                        out.append((a, b))
            kk //= 2
        p *= 2
    return out


def _pair_median_mad(padded: NDArray[np.float64], n: int, k: int
                     ) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Median and MAD of every window ``padded[i:i + 2k + 1]``, exact where it holds numbers.

    Windows ``2q`` and ``2q + 1`` share the ``2k`` values ``padded[2q + 1:2q + 2k + 1]``:
    these are sorted once per pair with a sorting network of element-wise minima and maxima
    (:func:`sorting_network`); each window then inserts its own extra value ``x``
    (``t_a = min(max(s_(a-1), x), s_a)``), which gives its sorted values ``t_0 .. t_2k`` and
    the median ``m = t_k``. The MAD is the ``(k+1)``-th smallest ``|t_a - m|``: the
    ``k + 1`` values nearest to ``m`` are ``k + 1`` consecutive sorted values around
    ``t_k``, so it is ``min over a = 0..k of max(m - t_a, t_(a+k) - m)``. Every operation
    only moves values or forms the same differences ``|t_a - m|`` that a direct
    computation forms (``m - t`` is exactly ``-(t - m)``), so the results are bit-identical
    to sorting each window. Rows whose window holds NaN give NaN or junk and are redone by
    the caller. Works in blocks of :data:`_PAIR_BLOCK` pairs; `padded` needs
    ``n + 2k + 2`` entries.
    """
    w = 2 * k + 1
    n_pairs = (n + 1) // 2
    med = np.empty(2 * n_pairs)
    mad = np.empty(2 * n_pairs)
    net = sorting_network(2 * k)
    # padded[2q + r] is halves[r % 2][q + r // 2]: every column below is a contiguous slice
    halves = (padded[0::2].copy(), padded[1::2].copy())
    size = min(_PAIR_BLOCK, n_pairs)
    pool = [np.empty(size) for _ in range(2 * k + 1)]  # buffers for the sorted values
    t = [np.empty(size) for _ in range(w)]
    d0, d1, d2 = (np.empty(size) for _ in range(3))
    for q0 in range(0, n_pairs, size):
        q1 = min(q0 + size, n_pairs)
        m = q1 - q0
        # the shared values padded[2q + 1 + j], read in place until a comparator writes them
        s = [halves[(1 + j) % 2][q0 + (1 + j) // 2:q1 + (1 + j) // 2] for j in range(2 * k)]
        owned = [False] * (2 * k)
        free = [c[:m] for c in pool]
        for i, j in net:  # sort the shared values
            lo = free.pop()
            hi = s[j] if owned[j] else free.pop()
            np.minimum(s[i], s[j], out=lo)
            np.maximum(s[i], s[j], out=hi)
            if owned[i]:
                free.append(s[i])
            s[i], s[j] = lo, hi
            owned[i] = owned[j] = True
        tt = [c[:m] for c in t]
        e1, e2, md = d1[:m], d2[:m], d0[:m]
        for parity, xx in ((0, halves[0][q0:q1]), (1, halves[1][q0 + k:q1 + k])):
            np.minimum(s[0], xx, out=tt[0])  # insert the window's own value x: sorted t
            for a in range(1, 2 * k):
                np.maximum(s[a - 1], xx, out=tt[a])
                np.minimum(tt[a], s[a], out=tt[a])
            np.maximum(s[2 * k - 1], xx, out=tt[2 * k])
            mid = tt[k]
            np.subtract(mid, tt[0], out=md)  # a = 0
            np.subtract(tt[2 * k], mid, out=e1)  # a = k
            np.minimum(md, e1, out=md)
            for a in range(1, k):
                np.subtract(mid, tt[a], out=e1)
                np.subtract(tt[a + k], mid, out=e2)
                np.maximum(e1, e2, out=e1)
                np.minimum(md, e1, out=md)
            med[2 * q0 + parity:2 * q1:2] = mid
            mad[2 * q0 + parity:2 * q1:2] = md
    return med[:n], mad[:n]


def _middle(sorted_cols: NDArray[np.float64], count: NDArray[np.int64]) -> NDArray[np.float64]:
    """Median of the first `count` values of each sorted column (NaN for none)."""
    cols = np.arange(sorted_cols.shape[1])
    lo = np.maximum((count - 1) // 2, 0)
    hi = np.minimum(np.maximum(count // 2, 0), sorted_cols.shape[0] - 1)
    out = (sorted_cols[lo, cols] + sorted_cols[hi, cols]) / 2
    out[count == 0] = np.nan
    return out
