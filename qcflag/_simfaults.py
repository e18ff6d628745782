"""Fault injection and simulated operators for :mod:`qcflag.simulate` (private helpers).

Every fault is applied to the flat level arrays at once (a loop over fault kinds, never over
levels or profiles). Each occurrence of a fault is an *event*; the levels it touches carry its
event id per variable, so that a simulated operator can miss or re-grade a whole event, as a
person looking at a plot does.

Truth-grade conventions (the project's own, stated here once)
--------------------------------------------------------------
* Spikes and spike pairs: grade 4 when the displacement exceeds the published Argo spike
  threshold at that pressure (temperature 6.0 / 2.0 degC, salinity 0.9 / 0.3 above / below
  500 dbar; Argo QC manual, DOI 10.13155/33951, test 9, via ../shared/reference/
  qc-standards.md), grade 3 when it is visible but smaller (sizes are drawn from 0.05 to 4
  times the threshold, so they straddle it). Adjacent levels: 2.
* Sensor offsets and drift: by the size of the error against what a data manager can see
  without calibration samples. 2 ('probably good': within what can be judged from the
  profiles alone) from 0.002 degC / 0.003 (instrument accuracy class) up to the
  *detectability* :data:`DETECTABLE`; 3 from there; 4 from the Argo gross-drift limits
  1 degC / 0.5 (test 16, same source). Code 3 is Argo's "probably bad, potentially
  adjustable". Detectability (this project's choice, stated in :data:`DETECTABLE`) is the
  error a person comparing a cast's deep levels with the other casts of the same cruise can
  tell from station-to-station variability: 0.02 in salinity and 0.1 degC in temperature,
  about three times the median absolute deviation of a clean simulated cast's deep levels
  from the cruise median at the same pressure (about 0.006 and 0.03 degC; checked by
  ``tests/test_simulate.py``).
* Thermal-lag salinity spikes, surface noise and bottom hooks: by the size of the error
  (thresholds in the code below), judgement of this project, not a published rule.
* Stuck values, digit rollover: 4. Pressure reversals: pressure 4, temperature and
  salinity of the reversed levels 3. Density inversions (a fresh block): salinity 4 where
  the potential-density decrease at its top exceeds 0.03 kg/m3 (Argo test 14), else 3;
  temperature 2.
* Wrong position or date: temperature and salinity of every level 3 (the values may be
  fine, but not where/when they are said to be), pressure unaffected.
* Missing values: grade 0 (no ordinal grade); operators flag them 9.
"""

from __future__ import annotations

import math
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd

from qcflag.schemes import NO_FLAG

if TYPE_CHECKING:
    from numpy.typing import NDArray

    from qcflag.simulate import SimulationConfig

VARS = ("temperature", "salinity", "pressure")
MISSING_CODE = 9

# published spike thresholds (Argo test 9, via ../shared/reference/qc-standards.md 1.3)
SPIKE_THRESHOLD = {"temperature": (6.0, 2.0), "salinity": (0.9, 0.3)}
# error a person can tell from the other casts of a cruise in deep water (module docstring)
DETECTABLE = {"temperature": 0.1, "salinity": 0.02}
# (probably good, probably bad, bad) error sizes per fault family; see module docstring
CALIBRATION = {"temperature": (0.002, DETECTABLE["temperature"], 1.0),
               "salinity": (0.003, DETECTABLE["salinity"], 0.5)}
THERMAL_LAG = (0.005, 0.02, 0.08)
SURFACE = {"temperature": (0.005, 0.02, 0.3), "salinity": (0.005, 0.02, 0.2)}
HOOK = (0.003, 0.01, 0.05)


def _kind_bit(kind: str) -> int:
    from qcflag.simulate import FAULT_KINDS

    return 1 << FAULT_KINDS.index(kind)


def grade_by_size(size: NDArray[np.float64], limits: tuple[float, float, float]
                  ) -> NDArray[np.int8]:
    """Grade 1-4 from an error size and the (2, 3, 4) lower limits."""
    a = np.abs(size)
    return (1 + (a >= limits[0]) + (a >= limits[1]) + (a >= limits[2])).astype(np.int8)


def run_levels(starts: NDArray[np.int64], lengths: NDArray[np.int64]
               ) -> tuple[NDArray[np.int64], NDArray[np.int64]]:
    """Flat level indices of runs ``starts[i] .. starts[i] + lengths[i] - 1`` and run ids."""
    lengths = np.maximum(lengths.astype(np.int64), 0)
    total = int(lengths.sum())
    run = np.repeat(np.arange(lengths.size), lengths)
    first = np.concatenate([[0], np.cumsum(lengths)[:-1]]) if lengths.size else lengths
    within = np.arange(total) - first[run]
    return starts.astype(np.int64)[run] + within, run


def _loguniform(rng: np.random.Generator, lo: float, hi: float, n: int) -> NDArray[np.float64]:
    return np.exp(rng.uniform(math.log(lo), math.log(hi), n))


class FaultBook:
    """Truth grades, fault marks and events of the levels of one simulated archive.

    Parameters
    ----------
    offsets : ndarray of int64
        Profile offsets.
    meta : dict
        Per-profile layout arrays from :func:`qcflag.simulate._layout`.
    rng : numpy.random.Generator
        The archive's random generator.
    """

    def __init__(self, offsets: NDArray[np.int64], meta: dict[str, Any],
                 rng: np.random.Generator) -> None:
        self.offsets = offsets
        self.meta = meta
        self.rng = rng
        self.counts = np.diff(offsets)
        n = int(offsets[-1])
        self.n_levels = n
        self.profile_index = np.repeat(np.arange(self.counts.size), self.counts)
        self.level_index = np.arange(n) - offsets[:-1][self.profile_index]
        self.grade = {v: np.ones(n, dtype=np.int8) for v in VARS}
        self.event = {v: np.full(n, -1, dtype=np.int64) for v in VARS}
        self.missing = {v: np.zeros(n, dtype=bool) for v in VARS}
        self.bits = np.zeros(n, dtype=np.int64)
        self.n_events = 0
        self.event_kind: list[NDArray[np.int64]] = []
        self.event_profile: list[NDArray[np.int64]] = []

    # ------------------------------------------------------------------ bookkeeping
    def new_events(self, where: NDArray[np.int64], kind: str) -> NDArray[np.int64]:
        """Allocate one event id of `kind` per entry of `where` (its profile, or -1)."""
        n = int(np.asarray(where).size)
        ids = np.arange(self.n_events, self.n_events + n, dtype=np.int64)
        self.n_events += n
        self.event_kind.append(np.full(n, _kind_bit(kind), dtype=np.int64))
        self.event_profile.append(np.asarray(where, dtype=np.int64).reshape(-1))
        return ids

    def events(self) -> dict[str, list[Any]]:
        """Every fault event: its kind and profile (-1 for a cruise-wide drift)."""
        from qcflag.simulate import FAULT_KINDS

        if not self.event_kind:
            return {"kind": [], "profile": []}
        bits = np.concatenate(self.event_kind)
        kinds = np.asarray(FAULT_KINDS, dtype=object)[np.log2(bits).astype(np.int64)]
        return {"kind": kinds.tolist(),
                "profile": np.concatenate(self.event_profile).tolist()}

    def mark(self, levels: NDArray[np.int64], var: str, grades: NDArray[np.int8] | int,
             kind: str, events: NDArray[np.int64] | int) -> None:
        """Raise the truth grade of `var` at `levels` to `grades` and record the fault.

        Only levels where the grade is 2 or more are marked with the fault and the event.
        """
        levels = np.asarray(levels, dtype=np.int64)
        g = np.broadcast_to(np.asarray(grades, dtype=np.int8), levels.shape)
        ev = np.broadcast_to(np.asarray(events, dtype=np.int64), levels.shape)
        keep = g >= 2
        levels, g, ev = levels[keep], g[keep], ev[keep]
        if not levels.size:
            return
        cur = self.grade[var]
        takes = g >= cur[levels]
        self.event[var][levels[takes]] = ev[takes]
        np.maximum.at(cur, levels, g)
        self.bits[levels] |= _kind_bit(kind)

    def neighbours(self, levels: NDArray[np.int64], reach: int = 1
                   ) -> tuple[NDArray[np.int64], NDArray[np.int64]]:
        """Return the levels within `reach` of `levels` in the same profile.

        The second array gives, for each, the index into `levels` of the level it neighbours.
        """
        levels = np.asarray(levels, dtype=np.int64)
        steps = [d for d in range(-reach, reach + 1) if d]
        cand = np.concatenate([levels + d for d in steps]) if levels.size else levels
        src = np.tile(np.arange(levels.size), len(steps)) if levels.size else levels
        ok = (cand >= 0) & (cand < self.n_levels)
        cand, src = cand[ok], src[ok]
        same = self.profile_index[cand] == self.profile_index[levels[src]]
        return cand[same], src[same]

    def choose_profiles(self, rate: float, eligible: NDArray[np.bool_] | None = None
                        ) -> NDArray[np.int64]:
        """Profiles hit by a per-profile Bernoulli fault."""
        u = self.rng.random(self.counts.size)
        hit = u < rate
        if eligible is not None:
            hit &= eligible
        return np.flatnonzero(hit)

    def poisson_profiles(self, rate: float, eligible: NDArray[np.bool_] | None = None
                         ) -> NDArray[np.int64]:
        """Profile index of each occurrence of a Poisson-count fault."""
        k = self.rng.poisson(rate, self.counts.size)
        if eligible is not None:
            k = np.where(eligible, k, 0)
        return np.repeat(np.arange(self.counts.size), k)

    def pick_level(self, prof: NDArray[np.int64], lo: int | NDArray[np.int64],
                   hi_margin: int) -> NDArray[np.int64]:
        """Pick a uniform level in ``[lo, count - hi_margin)`` of each profile in `prof` (flat)."""
        lo = np.broadcast_to(np.asarray(lo, dtype=np.int64), prof.shape)
        span = np.maximum(self.counts[prof] - hi_margin - lo, 1)
        j = lo + np.floor(self.rng.random(prof.size) * span).astype(np.int64)
        return self.offsets[prof] + j

    # ----------------------------------------------------------------- outputs
    def truth_arrays(self) -> dict[str, NDArray[np.int8]]:
        """Return the true grade per variable, 0 where the value is missing."""
        return {v: np.where(self.missing[v], 0, self.grade[v]).astype(np.int8) for v in VARS}

    def fault_strings(self) -> NDArray[np.object_]:
        """Return the ``;``-joined fault kinds per level (``""`` where none)."""
        from qcflag.simulate import FAULT_KINDS

        uniq, inv = np.unique(self.bits, return_inverse=True)
        names = np.array(
            [";".join(k for i, k in enumerate(FAULT_KINDS) if int(u) >> i & 1) for u in uniq],
            dtype=object,
        )
        return names[inv]

    def event_max(self, var: str) -> NDArray[np.int8]:
        """Worst truth grade of each event's levels in `var`."""
        out = np.zeros(self.n_events, dtype=np.int8)
        ev = self.event[var]
        has = ev >= 0
        np.maximum.at(out, ev[has], self.grade[var][has])
        return out


# ------------------------------------------------------------------------- pressure faults
def pressure_faults(book: FaultBook, p: NDArray[np.float64], cfg: SimulationConfig
                    ) -> NDArray[np.float64]:
    """Inject pressure reversals into the nominal pressure grid (before values exist).

    A reversal: from level ``k`` the package rises for ``m`` (3-8) levels at half the bin
    size per level, then the cast resumes one bin below the turning point.
    """
    rng = book.rng
    rate = cfg.fault_rates["pressure_reversal"]
    eligible = book.meta["is_ctd"] & (book.counts > 40)
    prof = book.choose_profiles(rate, eligible)
    if not prof.size:
        return p
    m = rng.integers(3, 9, prof.size)
    k_flat = book.pick_level(prof, 10, 12)
    k = k_flat - book.offsets[prof]
    ids = book.new_events(prof, "pressure_reversal")
    n_prof = book.counts.size
    kk = np.full(n_prof, -1, dtype=np.int64)
    mm = np.zeros(n_prof, dtype=np.int64)
    kk[prof], mm[prof] = k, m
    pi, j = book.profile_index, book.level_index
    kl, ml = kk[pi], mm[pi]
    hit = kl >= 0
    turn = book.offsets[:-1][pi] + np.maximum(kl, 1) - 1
    dp = cfg.ctd_spacing
    rev = hit & (j >= kl) & (j < kl + ml)
    after = hit & (j >= kl + ml)
    out = p.copy()
    out[rev] = p[turn[rev]] - (j[rev] - kl[rev] + 1) * 0.5 * dp
    out[after] = p[after] - ml[after] * dp
    levels = np.flatnonzero(rev)
    ev_of_prof = np.full(n_prof, -1, dtype=np.int64)
    ev_of_prof[prof] = ids
    ev = ev_of_prof[pi[levels]]
    book.mark(levels, "pressure", 4, "pressure_reversal", ev)
    book.mark(levels, "temperature", 3, "pressure_reversal", ev)
    book.mark(levels, "salinity", 3, "pressure_reversal", ev)
    edge = np.concatenate([turn[prof_first_levels(book, prof)], k_flat + m])
    edge_ev = np.concatenate([ids, ids])
    inside = book.profile_index[np.minimum(edge, book.n_levels - 1)] == np.concatenate([prof,
                                                                                         prof])
    book.mark(edge[inside], "pressure", 2, "pressure_reversal", edge_ev[inside])
    return out


def prof_first_levels(book: FaultBook, prof: NDArray[np.int64]) -> NDArray[np.int64]:
    """Flat index of the first level of each profile in `prof`."""
    return book.offsets[prof]


# ---------------------------------------------------------------------------- value faults
def value_faults(
    book: FaultBook,
    p: NDArray[np.float64],
    t: NDArray[np.float64],
    s: NDArray[np.float64],
    prof: pd.DataFrame,
    cfg: SimulationConfig,
) -> tuple[NDArray[np.float64], NDArray[np.float64], pd.DataFrame]:
    """Inject every value and metadata fault; returns new temperature, salinity, profiles."""
    rng = book.rng
    rates = cfg.fault_rates
    meta = book.meta
    is_ctd = meta["is_ctd"]
    vals = {"temperature": t.copy(), "salinity": s.copy()}
    pi = book.profile_index

    # -- drift: a cruise's CTD sensor drifts linearly from some cast to the last one
    cruises = meta["cruise_index"]
    n_cru = int(cruises.max()) + 1 if cruises.size else 0
    drifting = np.flatnonzero(rng.random(n_cru) < rates["drift"])
    d_var_s = rng.random(n_cru) < 0.7
    d_size = np.where(d_var_s, _loguniform(rng, 0.001, 0.05, n_cru),
                      _loguniform(rng, 0.001, 0.03, n_cru)) * rng.choice([-1.0, 1.0], n_cru)
    d_onset = rng.uniform(0.2, 0.7, n_cru)  # the sensor starts drifting part-way through
    if drifting.size:
        ids = book.new_events(np.full(drifting.size, -1), "drift")
        ev_of_cruise = np.full(n_cru, -1, dtype=np.int64)
        ev_of_cruise[drifting] = ids
        for var, is_s in (("salinity", True), ("temperature", False)):
            sel_c = np.zeros(n_cru, dtype=bool)
            sel_c[drifting] = d_var_s[drifting] == is_s
            lv = np.flatnonzero(sel_c[cruises[pi]] & is_ctd[pi])
            frac = meta["cast_fraction"][pi[lv]]
            onset = d_onset[cruises[pi[lv]]]
            err = d_size[cruises[pi[lv]]] * np.maximum(frac - onset, 0.0) / (1.0 - onset)
            vals[var][lv] += err
            book.mark(lv, var, grade_by_size(err, CALIBRATION[var]), "drift",
                      ev_of_cruise[cruises[pi[lv]]])

    # -- offset: a whole profile of one variable shifted
    hit = book.choose_profiles(rates["offset"])
    if hit.size:
        ids = book.new_events(hit, "offset")
        is_s = rng.random(hit.size) < 0.6
        size = np.where(is_s, _loguniform(rng, 0.005, 1.0, hit.size),
                        _loguniform(rng, 0.005, 2.0, hit.size))
        size *= rng.choice([-1.0, 1.0], hit.size)
        lv, run = run_levels(book.offsets[hit], book.counts[hit])
        for var, want in (("salinity", True), ("temperature", False)):
            sel = is_s[run] == want
            vals[var][lv[sel]] += size[run[sel]]
            book.mark(lv[sel], var, grade_by_size(size[run[sel]], CALIBRATION[var]), "offset",
                      ids[run[sel]])

    # -- thermal lag: salinity spike at the sharpest temperature step of a CTD cast
    hit = book.choose_profiles(rates["thermal_lag"], is_ctd & (book.counts > 8))
    if hit.size:
        tt = vals["temperature"]
        d = np.zeros(book.n_levels)
        d[1:-1] = np.abs(tt[2:] - tt[:-2])
        d[book.level_index < 2] = 0.0
        d[book.level_index >= book.counts[pi] - 2] = 0.0
        order = np.lexsort((d, pi))
        argmax = order[book.offsets[1:] - 1]
        k = argmax[hit]
        step = tt[k + 1] - tt[k - 1]
        gamma = _loguniform(rng, 0.03, 0.4, hit.size)
        ids = book.new_events(hit, "thermal_lag")
        shape = np.array([0.5, 1.0, 0.5])
        lv = (k[:, None] + np.arange(-1, 2)[None, :]).ravel()
        err = (-gamma * step)[:, None] * shape[None, :]
        vals["salinity"][lv] += err.ravel()
        g = grade_by_size(err.ravel(), THERMAL_LAG)
        book.mark(lv, "salinity", g, "thermal_lag", np.repeat(ids, 3))
        centre = g.reshape(-1, 3)[:, 1] >= 3
        ring = np.concatenate([k[centre] - 2, k[centre] + 2])
        book.mark(ring, "salinity", 2, "thermal_lag", np.concatenate([ids[centre]] * 2))

    # -- noisy near-surface levels
    hit = book.choose_profiles(rates["surface_noise"])
    if hit.size:
        depth = rng.uniform(5.0, 25.0, hit.size)
        ids = book.new_events(hit, "surface_noise")
        lv, run = run_levels(book.offsets[hit], book.counts[hit])
        keep = p[lv] < depth[run]
        lv, run = lv[keep], run[keep]
        for var in ("temperature", "salinity"):
            sd = _loguniform(rng, 0.01, 0.3 if var == "temperature" else 0.4, hit.size)
            err = sd[run] * rng.standard_normal(lv.size)
            vals[var][lv] += err
            book.mark(lv, var, grade_by_size(err, SURFACE[var]), "surface_noise", ids[run])

    # -- bottom salinity hook on casts that reach near the bottom
    hit = book.choose_profiles(rates["salinity_hook"], meta["near_bottom"] & (book.counts > 30))
    if hit.size:
        m = rng.integers(4, 26, hit.size)
        size = _loguniform(rng, 0.005, 0.5, hit.size) * np.where(rng.random(hit.size) < 0.8,
                                                                 -1.0, 1.0)
        ids = book.new_events(hit, "salinity_hook")
        lv, run = run_levels(book.offsets[hit + 1] - m, m)
        pos = (lv - (book.offsets[hit + 1] - m)[run] + 1) / m[run]
        err = size[run] * pos**2
        vals["salinity"][lv] += err
        book.mark(lv, "salinity", grade_by_size(err, HOOK), "salinity_hook", ids[run])

    # -- density inversion: a fresh block below the upper ocean
    deep_enough = book.counts > 12
    hit = book.choose_profiles(rates["density_inversion"], deep_enough)
    if hit.size:
        m = np.where(is_ctd[hit], rng.integers(2, 7, hit.size), rng.integers(1, 3, hit.size))
        lo = np.minimum(book.counts[hit] // 4, np.maximum(book.counts[hit] - m - 4, 1))
        start = book.pick_level(hit, lo, 0)
        start = np.minimum(start, book.offsets[hit + 1] - m - 2)
        fresh = rng.uniform(0.06, 0.5, hit.size)
        ids = book.new_events(hit, "density_inversion")
        lv, run = run_levels(start, m)
        vals["salinity"][lv] -= fresh[run]
        drop = _inversion_drop(start, p, vals["temperature"], vals["salinity"],
                               prof["latitude"].to_numpy()[pi[start]],
                               prof["longitude"].to_numpy()[pi[start]])
        g_s = np.where(drop > 0.03, 4, 3).astype(np.int8)
        book.mark(lv, "salinity", g_s[run], "density_inversion", ids[run])
        book.mark(lv, "temperature", 2, "density_inversion", ids[run])

    # -- single spikes and spike pairs
    for kind, width in (("spike", 1), ("spike_pair", 2)):
        hit = book.poisson_profiles(rates[kind], book.counts > 2 + width)
        if not hit.size:
            continue
        start = book.pick_level(hit, 1, 1 + width)
        ids = book.new_events(hit, kind)
        is_s = rng.random(hit.size) < 0.5
        factor = _loguniform(rng, 0.05, 4.0, hit.size)
        sign = rng.choice([-1.0, 1.0], hit.size)
        lv, run = run_levels(start, np.full(hit.size, width))
        jitter = np.where(lv == start[run], 1.0, rng.uniform(0.7, 1.3, lv.size))
        for var, want in (("salinity", True), ("temperature", False)):
            sel = is_s[run] == want
            lvs, rs = lv[sel], run[sel]
            shallow, deep = SPIKE_THRESHOLD[var]
            thr = np.where(p[start[rs]] < 500.0, shallow, deep)
            vals[var][lvs] += sign[rs] * factor[rs] * thr * jitter[sel]
            g = np.where(factor[rs] > 1.0, 4, 3).astype(np.int8)
            book.mark(lvs, var, g, kind, ids[rs])
            nb, src = book.neighbours(lvs)
            book.mark(nb, var, 2, kind, ids[rs][src])

    # -- stuck values: a sensor repeats one reading
    hit = book.choose_profiles(rates["stuck"], book.counts > 20)
    if hit.size:
        start = book.pick_level(hit, 5, 10)
        to_end = book.offsets[hit + 1] - start - 1
        m = np.where(rng.random(hit.size) < 0.4, to_end,
                     np.minimum(rng.integers(10, 151, hit.size), to_end))
        ids = book.new_events(hit, "stuck")
        is_s = rng.random(hit.size) < 0.5
        lv, run = run_levels(start + 1, m)
        for var, want in (("salinity", True), ("temperature", False)):
            sel = is_s[run] == want
            vals[var][lv[sel]] = vals[var][start[run[sel]]]
            book.mark(lv[sel], var, 4, "stuck", ids[run[sel]])
            first = start[is_s == want]
            book.mark(first, var, 2, "stuck", ids[is_s == want])

    # -- digit rollover: a few levels jump by a power-of-two-like span
    hit = book.choose_profiles(rates["digit_rollover"], book.counts > 8)
    if hit.size:
        m = rng.integers(1, 7, hit.size)
        start = book.pick_level(hit, 2, 8)
        ids = book.new_events(hit, "digit_rollover")
        is_s = rng.random(hit.size) < 0.3
        jump = np.where(is_s, rng.choice([5.12, 10.24], hit.size),
                        rng.choice([10.24, 20.48], hit.size)) * rng.choice([-1.0, 1.0], hit.size)
        lv, run = run_levels(start, m)
        for var, want in (("salinity", True), ("temperature", False)):
            sel = is_s[run] == want
            vals[var][lv[sel]] += jump[run[sel]]
            book.mark(lv[sel], var, 4, "digit_rollover", ids[run[sel]])
            nb, src = book.neighbours(lv[sel])
            book.mark(nb, var, 2, "digit_rollover", ids[run[sel]][src])

    # -- missing values (dropouts)
    hit = book.choose_profiles(rates["missing_value"], book.counts > 5)
    if hit.size:
        m = np.minimum(rng.geometric(0.15, hit.size), book.counts[hit] - 2)
        start = book.pick_level(hit, 0, m)
        which = rng.choice(3, hit.size, p=[0.2, 0.5, 0.3])  # T only, S only, both
        book.new_events(hit, "missing_value")  # recorded; operators flag missing values 9
        lv, run = run_levels(start, m)
        for var, codes in (("temperature", (0, 2)), ("salinity", (1, 2))):
            sel = np.isin(which[run], codes)
            vals[var][lv[sel]] = np.nan
            book.missing[var][lv[sel]] = True
            book.bits[lv[sel]] |= _kind_bit("missing_value")

    prof = _metadata_faults(book, prof, rates)
    return vals["temperature"], vals["salinity"], prof


def _inversion_drop(start: NDArray[np.int64], p: NDArray[np.float64], t: NDArray[np.float64],
                    s: NDArray[np.float64], lat: NDArray[np.float64], lon: NDArray[np.float64]
                    ) -> NDArray[np.float64]:
    """Potential-density decrease (kg/m3) from level ``start - 1`` to ``start``.

    Both levels referenced to their mid-point pressure (Argo test 14 convention), TEOS-10.
    """
    import gsw

    a, b = start - 1, start
    pref = 0.5 * (p[a] + p[b])

    def rho(i: NDArray[np.int64]) -> NDArray[np.float64]:
        sa = gsw.SA_from_SP(s[i], p[i], lon, lat)
        ct = gsw.CT_from_t(sa, t[i], p[i])
        return np.asarray(gsw.rho(sa, ct, pref))

    with np.errstate(invalid="ignore"):
        return np.nan_to_num(rho(a) - rho(b), nan=0.0)


def _metadata_faults(book: FaultBook, prof: pd.DataFrame, rates: dict[str, float]
                     ) -> pd.DataFrame:
    """Wrong positions and dates; the real ones stay in ``truth_*`` profile columns."""
    rng = book.rng
    prof = prof.copy()
    prof["truth_time"] = prof["time"]
    prof["truth_latitude"] = prof["latitude"]
    prof["truth_longitude"] = prof["longitude"]
    lat = prof["latitude"].to_numpy().copy()
    lon = prof["longitude"].to_numpy().copy()
    hit = book.choose_profiles(rates["bad_position"])
    if hit.size:
        mode = rng.integers(0, 3, hit.size)
        new_lat = np.where(mode == 1, lon[hit], lat[hit])
        new_lon = np.select([mode == 0, mode == 1], [-lon[hit], lat[hit]], lon[hit] / 10.0)
        lat[hit], lon[hit] = new_lat, np.round(new_lon, 4)
        _mark_profiles(book, hit, "bad_position")
    prof["latitude"], prof["longitude"] = lat, lon
    hit = book.choose_profiles(rates["bad_date"])
    if hit.size:
        times = prof["time"].to_numpy().astype("datetime64[s]")
        old = times[hit]
        mode = rng.integers(0, 3, hit.size)
        tod = old - old.astype("datetime64[D]")
        epoch = np.datetime64("1970-01-01T00:00:00", "s") + tod
        years = old.astype("datetime64[Y]").astype(np.int64) + 1970
        shift = np.where(mode == 1, 10, -100)
        shifted = np.array(
            [pd.Timestamp(x).replace(year=int(y)).to_datetime64() if not (
                pd.Timestamp(x).month == 2 and pd.Timestamp(x).day == 29) else
             pd.Timestamp(x).replace(day=28, year=int(y)).to_datetime64()
             for x, y in zip(old, years + shift, strict=True)],
            dtype="datetime64[s]",
        ) if hit.size else old
        times[hit] = np.where(mode == 0, epoch, shifted)
        prof["time"] = pd.to_datetime(times.astype("datetime64[ns]"))
        _mark_profiles(book, hit, "bad_date")
    return prof


def _mark_profiles(book: FaultBook, hit: NDArray[np.int64], kind: str) -> None:
    ids = book.new_events(hit, kind)
    lv, run = run_levels(book.offsets[hit], book.counts[hit])
    book.mark(lv, "temperature", 3, kind, ids[run])
    book.mark(lv, "salinity", 3, kind, ids[run])


# ------------------------------------------------------------------------------ operators
HABITS = ("miss_small", "miss_large", "severity_bias", "probably_good_use", "mistake_rate",
          "false_flag_rate")


def draw_operators(rng: np.random.Generator, cfg: SimulationConfig) -> list[dict[str, float]]:
    """Draw the habits of every operator from the configured ranges."""
    from qcflag.simulate import OPERATORS

    n = len(OPERATORS)
    draws = {h: rng.uniform(*getattr(cfg, h), n) for h in HABITS}
    return [{h: round(float(draws[h][i]), 5) for h in HABITS} for i in range(n)]


def operator_flags(
    book: FaultBook,
    truth: dict[str, NDArray[np.int8]],
    ops: list[dict[str, float]],
    op_of_level: NDArray[np.int64],
    rng: np.random.Generator,
    cfg: SimulationConfig,
) -> tuple[dict[str, NDArray[np.int8]], dict[str, NDArray[np.bool_]]]:
    """Write each operator's manual flags (Argo codes) and where they are wrong.

    Per fault event the operator may miss it entirely (all its levels flagged 1; 'probably
    bad' events are missed more often than 'bad' ones), or shift it between 3 and 4
    according to their severity habit; 'probably good' truth is written 2 or 1 according to
    their use of that grade; runs of good levels are occasionally flagged 3/4; and a fraction
    of flagged levels gets a wrong grade outright. Missing values are flagged 9.

    The returned error masks (per variable) are True where the manual grade differs from the
    true grade, except a 'probably good' level written 1 by the operator's habit.
    """
    hab = {h: np.array([o[h] for o in ops])[op_of_level] for h in HABITS}
    n_ev = book.n_events
    u_miss, u_sev, u_pg = rng.random(n_ev), rng.random(n_ev), rng.random(n_ev)
    n = book.n_levels
    flags: dict[str, NDArray[np.int8]] = {}
    error: dict[str, NDArray[np.bool_]] = {}
    for var in VARS:  # loop over the three variables
        g = truth[var]
        ev = book.event[var]
        has = ev >= 0
        evc = np.where(has, ev, 0)
        emax = book.event_max(var)[evc] if n_ev else np.zeros(n, np.int8)
        manual = g.copy()
        miss_p = np.where(emax >= 4, hab["miss_large"], hab["miss_small"])
        missed = has & (emax >= 3) & (u_miss[evc] < miss_p) if n_ev else np.zeros(n, bool)
        manual[missed & (g >= 2)] = 1
        bias = hab["severity_bias"]
        live = has & ~missed
        sev = u_sev[evc] if n_ev else np.ones(n)
        manual[live & (g == 3) & (bias > 0) & (sev < bias)] = 4
        manual[live & (g == 4) & (bias < 0) & (sev < -bias)] = 3
        pg_u = np.where(has, u_pg[evc] if n_ev else 1.0, rng.random(n))
        habit = (g == 2) & ~missed & (pg_u >= hab["probably_good_use"])
        manual[habit] = 1
        # wrongly flagged runs of good levels
        u_false = rng.random(n)
        starts = np.flatnonzero(u_false < hab["false_flag_rate"])
        if starts.size and var != "pressure":
            lens = rng.integers(1, 7, starts.size)
            prof_end = book.offsets[book.profile_index[starts] + 1]
            lens = np.minimum(lens, prof_end - starts)
            lv, run = run_levels(starts, lens)
            wrong = np.where(rng.random(starts.size) < 0.7, 3, 4).astype(np.int8)
            good = g[lv] == 1
            manual[lv[good]] = wrong[run[good]]
        # outright mistakes among flagged levels
        flagged = np.flatnonzero(manual >= 2)
        slip = flagged[rng.random(flagged.size) < hab["mistake_rate"][flagged]]
        shift = rng.integers(1, 4, slip.size)
        manual[slip] = ((manual[slip] - 1 + shift) % 4 + 1).astype(np.int8)
        codes = manual.astype(np.int8)
        codes[book.missing[var]] = MISSING_CODE
        if var == "pressure":
            codes[g == 0] = NO_FLAG
        flags[var] = codes
        # writing 1 for a 'probably good' level out of habit is a style, not a mistake
        error[var] = (g > 0) & (manual != g) & ~(habit & (manual == 1))
    return flags, error
