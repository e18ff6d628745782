"""Learning benchmark: training and prediction on about 1,000,000 simulated levels.

Usage::

    python3 bench/bench_learn.py           # ~1,000,000 levels (several minutes)
    python3 bench/bench_learn.py --quick   # ~70,000 levels

Features come from the real chain (simulated archive -> standard rules -> build_features), so
the matrix has the width and NaN pattern of production. Figures are measured in one run:
training time of the ordinal logistic model (LogisticAT, default subsampling of the commonest
grade), of the cumulative boosted model (HistGradientBoosting trees) and of the cumulative
boosted oblivious-tree model, and prediction throughput of each (levels per second of
predict_proba on the full matrix, the median of ``PREDICT_RUNS`` calls, and its ratio to
the target). Targets: linear training < 60 s, prediction >= 1,000,000 levels/s.
Training runs on one thread (BLAS/OpenMP limited; the machine is shared). Prediction is
timed twice, in turns, so that a slow spell of the machine falls on both alike: on one
thread (the figure per core, what each single-threaded dask worker gets) and on the
default thread count, what ``qcflag flag`` and ``predict_proba`` use in one process
(scikit-learn's OpenMP choice: every usable core unless ``threadpoolctl`` or
``OMP_NUM_THREADS`` limit it).
"""

from __future__ import annotations

import argparse
import time
from typing import Any

import numpy as np

PREDICT_RUNS = 3
"""Timed predictions per model; the median counts (a single run of about a second varies
by a third from one call to the next on this machine, even in one process)."""


def _features(n_cruises: int) -> tuple[np.ndarray, np.ndarray, float]:
    from qcflag.features import build_features
    from qcflag.learn.model import labels_for
    from qcflag.rules import run_checks
    from qcflag.simulate import simulate_archive

    t0 = time.perf_counter()
    batch = simulate_archive(n_cruises, seed=11)
    checks = run_checks(batch)
    X, _ = build_features(batch, checks, "temperature")
    y = labels_for(batch, "temperature")
    keep = y > 0
    return X[keep], y[keep], time.perf_counter() - t0


def main(quick: bool = False) -> list[dict[str, Any]]:
    """Measure and print the learning figures; return them as rows for run_all."""
    from threadpoolctl import threadpool_limits

    from qcflag.learn.trees import effective_threads

    default_threads = effective_threads(None)  # before the one-thread limit below
    with threadpool_limits(limits=1):
        return _measure(quick, default_threads)


def _predict_times(est: Any, X: np.ndarray, default_threads: int) -> dict[int, list[float]]:
    """Seconds per predict_proba call, ``PREDICT_RUNS`` per thread count, taken in turns."""
    from threadpoolctl import threadpool_limits

    times: dict[int, list[float]] = {1: [], default_threads: []}
    for _ in range(PREDICT_RUNS):
        for nt in times:
            with threadpool_limits(limits=nt):
                t0 = time.perf_counter()
                p = est.predict_proba(X)
                times[nt].append(time.perf_counter() - t0)
            assert np.allclose(p.sum(axis=1), 1.0)
    return times


def _measure(quick: bool, default_threads: int) -> list[dict[str, Any]]:
    from qcflag.learn import (
        CumulativeBoostedClassifier,
        CumulativeObliviousClassifier,
        OrdinalLogistic,
    )

    X, y, t_feat = _features(2 if quick else 30)
    n = X.shape[0]
    rows: list[dict[str, Any]] = [
        {"benchmark": "learn", "figure": "levels (temperature, labelled)", "value": float(n)},
        {"benchmark": "learn", "figure": "simulate + checks + features", "value": t_feat,
         "unit": "s"},
    ]
    for name, est, target in (
        ("logistic-at", OrdinalLogistic("at"), 60.0),
        ("boosted", CumulativeBoostedClassifier(), None),
        ("boosted-oblivious", CumulativeObliviousClassifier(), None),
    ):
        t0 = time.perf_counter()
        est.fit(X, y)
        t_fit = time.perf_counter() - t0
        est.predict_proba(X[:1000])  # warm-up (builds the tree predictors once)
        rows.append({"benchmark": "learn", "figure": f"{name} training", "value": t_fit,
                     "unit": "s", "target": "< 60 s" if target else "",
                     "met": (t_fit < target) if target else None})
        for nt, times in _predict_times(est, X, default_threads).items():
            rate = n / sorted(times)[len(times) // 2]  # the median run
            label = f"{name} prediction, {nt} thread{'s' if nt > 1 else ''}"
            rows.append({"benchmark": "learn", "figure": label, "value": rate,
                         "unit": "levels/s", "target": ">= 1,000,000",
                         "met": rate >= 1_000_000})
            rows.append({"benchmark": "learn", "figure": f"{label} / target",
                         "value": rate / 1_000_000, "unit": "x", "target": ">= 1",
                         "met": None})
            rows.append({"benchmark": "learn", "figure": f"{label}, every run",
                         "value": ", ".join(f"{n / t / 1e6:.2f}M" for t in times),
                         "unit": "levels/s"})
    for r in rows:
        value = r["value"] if isinstance(r["value"], str) else f"{r['value']:,.2f}"
        print(f"{r['figure']:<50} {value:>14} {r.get('unit', ''):<9} {r.get('target', '')}")
    return rows


if __name__ == "__main__":
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="small sizes")
    main(quick=ap.parse_args().quick)
