"""Small, fast generator of invented profiles for the benchmarks (not real data).

Profiles have a smooth thermocline and halocline with small noise, random lengths and
positions (some inside the Mediterranean and Red Sea polygons of the standard rule set),
and a sprinkling of faults (spikes, stuck runs, pressure reversals, missing values) so that
every check has something to grade. Generated fully vectorised, so a million levels take a
fraction of a second.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from qcflag import ProfileBatch


def synthetic_batch(n_levels: int = 1_000_000, *, min_levels: int = 20,
                    max_levels: int = 1000, seed: int = 0) -> ProfileBatch:
    """Return about `n_levels` invented levels in profiles of `min_levels`..`max_levels`."""
    rng = np.random.default_rng(seed)
    mean = (min_levels + max_levels) / 2
    counts = rng.integers(min_levels, max_levels + 1, size=int(n_levels / mean) + 1)
    counts = counts[np.cumsum(counts) <= n_levels]
    counts = np.append(counts, n_levels - counts.sum()) if counts.sum() < n_levels else counts
    n_prof = counts.size
    offsets = np.concatenate([[0], np.cumsum(counts)]).astype(np.int64)
    pi = np.repeat(np.arange(n_prof), counts)
    li = np.arange(offsets[-1]) - offsets[:-1][pi]
    step = rng.uniform(1.0, 10.0, n_prof)[pi]
    p = 2.0 + li * step
    t0 = rng.uniform(5.0, 28.0, n_prof)[pi]
    t = 2.0 + (t0 - 2.0) * np.exp(-p / 400.0) + rng.normal(0, 0.003, p.size)
    s = 34.7 + rng.uniform(-0.5, 1.5, n_prof)[pi] * np.exp(-p / 600.0)
    s = s + rng.normal(0, 0.001, p.size)
    t, s = np.round(t, 3), np.round(s, 3)
    # faults: spikes, stuck runs, reversed pressures, missing values
    k = rng.choice(p.size, size=p.size // 2000, replace=False)
    t[k] += rng.choice([-1, 1], k.size) * rng.uniform(3, 9, k.size)
    k = rng.choice(p.size, size=p.size // 2000, replace=False)
    s[k] += rng.choice([-1, 1], k.size) * rng.uniform(0.4, 2.0, k.size)
    for start in rng.choice(p.size - 40, size=max(p.size // 50_000, 1), replace=False):
        t[start:start + 30] = t[start]  # stuck runs (a handful; loop is over faults only)
    k = rng.choice(p.size, size=p.size // 5000, replace=False)
    p[k] -= rng.uniform(5, 40, k.size)
    k = rng.choice(p.size, size=p.size // 3000, replace=False)
    s[k] = np.nan
    lat = rng.uniform(-60, 60, n_prof)
    lon = rng.uniform(-180, 180, n_prof)
    med = rng.random(n_prof) < 0.05
    lat[med], lon[med] = rng.uniform(35, 39, med.sum()), rng.uniform(5, 20, med.sum())
    profiles = pd.DataFrame({
        "profile_id": [f"P{i:06d}" for i in range(n_prof)],
        "cruise": [f"C{i // 50:04d}" for i in range(n_prof)],
        "time": pd.Timestamp("2015-01-01") + pd.to_timedelta(rng.uniform(0, 3000, n_prof),
                                                             unit="D"),
        "latitude": lat, "longitude": lon, "platform": "synthetic",
    })
    return ProfileBatch(offsets=offsets, pressure=p, temperature=t, salinity=s,
                        profiles=profiles)
