"""Vectorised helpers over the ragged batch (flat level arrays + profile offsets).

Every helper works on the whole batch at once: neighbour look-ups are masked at profile
boundaries, "previous valid level" is an index forward-fill with
:func:`numpy.maximum.accumulate`, and moving windows are gathered into a
``(n_levels, window)`` matrix. None of them loops in Python over levels or profiles.
"""

from __future__ import annotations

import hashlib
import weakref
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
    "inside_polygon",
    "moving_median_mad",
    "next_valid_index",
    "prev_valid_index",
    "profile_reduce",
    "run_lengths",
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
    """
    key = ("prev", _digest(valid))
    memo = _memo(batch)
    if key not in memo:
        n = valid.size
        idx = np.where(valid, np.arange(n, dtype=np.int64), -1)
        filled = np.maximum.accumulate(idx) if n else idx
        prev = np.empty(n, dtype=np.int64)
        if n:
            prev[0] = -1
            prev[1:] = filled[:-1]
        prev[prev < _bounds(batch)[0]] = -1
        prev.setflags(write=False)
        memo[key] = prev
    return memo[key]


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
    key = ("next", _digest(valid))
    memo = _memo(batch)
    if key not in memo:
        n = valid.size
        big = np.iinfo(np.int64).max
        idx = np.where(valid, np.arange(n, dtype=np.int64), big)
        filled = np.minimum.accumulate(idx[::-1])[::-1] if n else idx
        nxt = np.empty(n, dtype=np.int64)
        if n:
            nxt[-1] = big
            nxt[:-1] = filled[1:]
        nxt[nxt >= _bounds(batch)[1]] = -1
        nxt.setflags(write=False)
        memo[key] = nxt
    return memo[key]


def _memo(batch: ProfileBatch) -> dict[Any, Any]:
    """Per-batch cache of neighbour indices (batches are immutable; dropped with the batch)."""
    memo = _MEMO.get(batch)
    if memo is None:
        memo = _MEMO[batch] = {}
    if len(memo) > 32:
        memo.clear()
    return memo


def _digest(valid: NDArray[np.bool_]) -> bytes:
    return hashlib.blake2b(np.packbits(valid).tobytes() + valid.size.to_bytes(8, "little"),
                           digest_size=16).digest()


def _bounds(batch: ProfileBatch) -> tuple[NDArray[np.int64], NDArray[np.int64]]:
    """First index and one-past-last index of each level's profile."""
    memo = _memo(batch)
    if "bounds" not in memo:
        pi = batch.profile_index
        memo["bounds"] = (batch.offsets[:-1][pi], batch.offsets[1:][pi])
    return memo["bounds"]


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
    return np.asarray(per_profile)[batch.profile_index]


def profile_reduce(batch: ProfileBatch, values: NDArray[np.float64],
                   valid: NDArray[np.bool_], kind: str) -> NDArray[np.float64]:
    """Reduce the valid values of each profile to one number.

    Parameters
    ----------
    batch : ProfileBatch
        The batch.
    values : ndarray of float64, shape (n_levels,)
        Level values.
    valid : ndarray of bool, shape (n_levels,)
        Levels to include.
    kind : {"min", "max", "count"}
        The reduction.

    Returns
    -------
    ndarray of float64, shape (n_profiles,)
        NaN for "min"/"max" of a profile without valid levels.
    """
    if kind == "count":
        return np.bincount(batch.profile_index, weights=valid.astype(np.float64),
                           minlength=batch.n_profiles)
    fill = np.inf if kind == "min" else -np.inf
    ufunc = np.minimum if kind == "min" else np.maximum
    out = np.full(batch.n_profiles, fill)
    nonempty = np.flatnonzero(batch.counts > 0)
    if nonempty.size:
        filled = np.where(valid, values, fill)
        out[nonempty] = ufunc.reduceat(filled, batch.offsets[:-1][nonempty])
    out[np.isinf(out)] = np.nan
    return out


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
    return np.maximum(minimum - values, values - maximum)  # NaN propagates


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
    vast majority) go through a median selection network of element-wise minima and maxima
    over the window's columns (exact: it only moves values), in cache-sized blocks of rows;
    the few windows cut by a profile end or a gap are gathered into a matrix and sorted
    row-wise (NaN last). No Python loop over levels or profiles.

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
        of the two middle values.
    count : ndarray of int64, shape (n_levels,)
        Valid levels in each window.
    """
    n = values.size
    k = int(half_window)
    w = 2 * k + 1
    if n == 0:
        return np.zeros(0), np.zeros(0), np.zeros(0, dtype=np.int64)
    # usable values, padded with NaN so that every level has a full window view
    padded = np.full(n + 2 * k, np.nan)
    np.copyto(padded[k:k + n], values, where=valid)
    view = np.lib.stride_tricks.sliding_window_view(padded, w)
    ok = np.zeros(n + 2 * k + 1, dtype=np.int64)
    ok[k + 1:k + 1 + n] = np.cumsum(valid)
    ok[k + 1 + n:] = ok[k + n]
    count = ok[w:w + n] - ok[:n]
    # windows reaching past their profile's ends (2k levels per profile): mask the slots
    above = batch.level_index
    below = batch.counts[batch.profile_index] - above - 1
    offs = np.arange(-k, k + 1, dtype=np.int64)
    edge = np.flatnonzero((above < k) | (below < k))
    if edge.size:
        outside = (offs[None, :] < -above[edge, None]) | (offs[None, :] > below[edge, None])
        count[edge] = np.count_nonzero(~np.isnan(view[edge]) & ~outside, axis=1)
    full = count == w
    med = np.full(n, np.nan)
    mad = np.full(n, np.nan)
    if w <= _NETWORK_MAX:
        _network_median_mad(padded, n, w, med, mad)  # rows not full are redone below
    else:
        rows = np.flatnonzero(full)
        win = view[rows]
        win.partition(w // 2, axis=1)
        med[rows] = win[:, w // 2]
        win = np.abs(view[rows] - med[rows, None])
        win.partition(w // 2, axis=1)
        mad[rows] = win[:, w // 2]
    rest = np.flatnonzero(~full)
    if rest.size:  # rows near profile ends or gaps: sort (NaN last) and pick
        sub = view[rest]
        sub[(offs[None, :] < -above[rest, None]) | (offs[None, :] > below[rest, None])] = np.nan
        c = count[rest]
        m = _middle(np.sort(sub, axis=1), c)
        med[rest] = m
        mad[rest] = _middle(np.sort(np.abs(sub - m[:, None]), axis=1), c)
    return med, mad, count


_NETWORK_MAX = 31
"""Largest window that uses the selection network (larger ones use np.partition)."""

_BLOCK = 8192
"""Rows per block of the selection network (its columns stay in the CPU cache)."""


def _merge_network(n: int) -> list[tuple[int, int]]:
    """Return the comparators of Batcher's odd-even merge sort for `n` wires, in order.

    Built for the next power of two; comparators touching a wire ``>= n`` are dropped, which
    is exact for `n` inputs (the missing wires act as +inf and never move).
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


_SELECTORS: dict[int, list[tuple[int, int, bool, bool]]] = {}


def _selector(w: int) -> list[tuple[int, int, bool, bool]]:
    """Return the sorting network of `w` wires pruned to what the middle wire needs.

    Each entry is ``(i, j, keep_min, keep_max)``: compare wires ``i < j`` and store the
    minimum on ``i`` and/or the maximum on ``j`` (only the outputs used later).
    """
    if w not in _SELECTORS:
        needed = {w // 2}
        kept: list[tuple[int, int, bool, bool]] = []
        for i, j in reversed(_merge_network(w)):
            lo, hi = i in needed, j in needed
            if lo or hi:
                kept.append((i, j, lo, hi))
                needed |= {i, j}
        _SELECTORS[w] = kept[::-1]
    return _SELECTORS[w]


def _network_median_mad(padded: NDArray[np.float64], n: int, w: int,
                        med: NDArray[np.float64], mad: NDArray[np.float64]) -> None:
    """Middle value of each full window and of its absolute deviations, into `med`, `mad`.

    Window ``i`` is ``padded[i:i + w]``. Only rows whose window holds `w` numbers are
    meaningful (others are overwritten by the caller).
    """
    net = _selector(w)
    mid = w // 2
    for s in range(0, n, _BLOCK):
        e = min(s + _BLOCK, n)
        cols = [padded[s + j:e + j] for j in range(w)]
        m = _select(cols, net, mid)
        med[s:e] = m
        mad[s:e] = _select([np.abs(c - m) for c in cols], net, mid)


def _select(cols: list[NDArray[np.float64]], net: list[tuple[int, int, bool, bool]],
            mid: int) -> NDArray[np.float64]:
    """Run the pruned network on column arrays (inputs are not modified)."""
    cols = list(cols)
    for i, j, lo, hi in net:
        a, b = cols[i], cols[j]
        if lo:
            cols[i] = np.minimum(a, b)
        if hi:
            cols[j] = np.maximum(a, b)
    return cols[mid]


def _middle(sorted_rows: NDArray[np.float64], count: NDArray[np.int64]) -> NDArray[np.float64]:
    rows = np.arange(sorted_rows.shape[0])
    lo = np.maximum((count - 1) // 2, 0)
    hi = np.maximum(count // 2, 0)
    hi = np.minimum(hi, sorted_rows.shape[1] - 1)
    out = (sorted_rows[rows, lo] + sorted_rows[rows, hi]) / 2
    out[count == 0] = np.nan
    return out
