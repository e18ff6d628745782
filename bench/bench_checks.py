"""Benchmark: the standard rule set, vectorised, against a plain per-profile loop.

Usage::

    python3 bench/bench_checks.py            # 1,000,000 levels (the loop takes minutes)
    python3 bench/bench_checks.py --quick    # 50,000 levels

Both implementations run qcflag's own checks of rules/standard.toml (the steps of the
reference-data checks — date, position, on_land, climatology, below_seafloor — have no loop
version and are timed separately, vectorised only) on the same invented profiles from
bench/_synthetic.py, and their results are asserted identical. The figures are measured in
one run, so the ratio compares like with like on this machine.

Both are timed in steady state: before the timed runs, the vectorised checks run once on a
copy of the batch (a different object, so no per-batch cache carries over; this warms
imports, gsw's tables and the memory allocator for arrays of this size) and the loop runs on
the first profiles of that copy (its cost is per level and profile, so warming it on all of
them would only double the run time). The vectorised checks take about a second, so one
burst of other work on a shared machine can double their time: they are timed three times
(once before the loop, twice after it, each on its own copy of the batch) and the median
is the figure; the loop runs for half a minute or more and is timed once. Wall-clock times
are the figures; the process CPU times are printed beside them as a check.
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path
from typing import Any

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))

from _synthetic import synthetic_batch
from loop_checks import own_steps, run_checks_loop

from qcflag import ProfileBatch
from qcflag.rules import load_rules, run_checks

TARGET_RATIO = 30.0


def _same(a: Any, b: Any) -> None:
    assert list(a.results) == list(b.results), "different result keys"
    for key in a.results:
        ra, rb = a.results[key], b.results[key]
        assert np.array_equal(ra.grade, rb.grade), f"grades differ for {key}"
        assert np.array_equal(ra.statistic, rb.statistic, equal_nan=True), \
            f"statistics differ for {key}"


def _copy(batch: ProfileBatch) -> ProfileBatch:
    """Return an equal batch that shares no arrays (or cached geometry) with `batch`."""
    return ProfileBatch(offsets=batch.offsets.copy(), pressure=batch.pressure.copy(),
                        temperature=batch.temperature.copy(),
                        salinity=batch.salinity.copy(), profiles=batch.profiles.copy())


def _timed(func: Any, *args: Any) -> tuple[Any, float, float]:
    """Run ``func(*args)``; return its result, wall-clock and process CPU seconds."""
    w0, c0 = time.perf_counter(), time.process_time()
    out = func(*args)
    return out, time.perf_counter() - w0, time.process_time() - c0


def main(quick: bool = False) -> dict[str, Any]:
    """Time vectorised and loop checks on the same batch; return the figures.

    Parameters
    ----------
    quick : bool, default=False
        50,000 levels instead of 1,000,000.

    Returns
    -------
    dict
        ``benchmark``, ``figure``, ``value`` (the speed-up ratio), ``target``, ``met`` (for
        bench/run_all.py) plus ``n_levels``, ``vectorised_s`` (median of three runs),
        ``vectorised_runs_s``, ``loop_s``,
        ``vectorised_levels_per_s``, ``loop_levels_per_s``, ``vectorised_cpu_s``,
        ``loop_cpu_s``, ``full_rule_set_s`` and ``full_rule_set_levels_per_s``.
    """
    n = 50_000 if quick else 1_000_000
    batch = synthetic_batch(n, seed=11)
    rules = own_steps("standard")
    full = load_rules("standard")
    warm = _copy(batch)  # steady state for both, outside the timing (see the module notes)
    run_checks(warm, rules)
    run_checks(warm, full)
    run_checks_loop(warm[:50], rules)
    del warm
    vec, t_vec, c_vec = _timed(run_checks, batch, rules)
    loop, t_loop, c_loop = _timed(run_checks_loop, batch, rules)
    _same(vec, loop)
    again = [_timed(run_checks, copy, rules)[1:] for copy in (_copy(batch), _copy(batch))]
    t_runs = sorted([t_vec] + [t for t, _ in again])
    c_runs = sorted([c_vec] + [c for _, c in again])
    t_vec, c_vec = t_runs[1], c_runs[1]  # medians
    _, t_full, _ = _timed(run_checks, batch, full)
    ratio = t_loop / t_vec
    out = {
        "benchmark": "bench_checks",
        "figure": f"standard rule set, vectorised vs per-profile loop ({batch.n_levels:,} levels)",
        "value": ratio,
        "unit": "x",
        "target": f">= {TARGET_RATIO:.0f}x",
        "met": ratio >= TARGET_RATIO,
        "n_levels": batch.n_levels,
        "n_profiles": batch.n_profiles,
        "vectorised_s": t_vec,
        "vectorised_runs_s": t_runs,
        "loop_s": t_loop,
        "vectorised_cpu_s": c_vec,
        "loop_cpu_s": c_loop,
        "vectorised_levels_per_s": batch.n_levels / t_vec,
        "loop_levels_per_s": batch.n_levels / t_loop,
        "full_rule_set_s": t_full,
        "full_rule_set_levels_per_s": batch.n_levels / t_full,
    }
    print(f"levels: {batch.n_levels:,} in {batch.n_profiles:,} profiles "
          f"({len(rules.steps)} own steps; results identical)")
    print(f"vectorised: {t_vec:8.2f} s  {out['vectorised_levels_per_s']:>12,.0f} levels/s  "
          f"(CPU {c_vec:.2f} s; median of {', '.join(f'{t:.2f}' for t in t_runs)} s)")
    print(f"plain loop: {t_loop:8.2f} s  {out['loop_levels_per_s']:>12,.0f} levels/s  "
          f"(CPU {c_loop:.2f} s)")
    print(f"ratio:      {ratio:8.1f} x  (target >= {TARGET_RATIO:.0f}x; CPU-time ratio "
          f"{c_loop / c_vec:.1f} x)")
    print(f"full standard rule set incl. reference-data checks, vectorised: {t_full:.2f} s "
          f"({out['full_rule_set_levels_per_s']:,.0f} levels/s)")
    return out


if __name__ == "__main__":
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="50,000 levels")
    main(quick=parser.parse_args().quick)
