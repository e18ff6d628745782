"""Held-out acceptance figures of the combiner and the audit on the invented scenario.

Simulates the demo programme (invented data with known truth), trains the default model on
all cruises but a few held-out ones (grouped cross-validation by cruise inside training;
the fusion and calibration are fitted on its out-of-fold predictions), flags the held-out
cruises and compares with the truth:

* recall of truly probably-bad-or-bad levels (truth grade >= 3) and the false-alarm rate on
  truly good levels (truth grade 1), for temperature and salinity, under the default
  decision (minimum expected cost), under ``--target-recall 0.95``, and the best recall
  reachable at a 1 % false-alarm rate (the ROC point of the calibrated P(grade >= 3));
* the share of the top 100 audit rows that are real manual mistakes (the manual grade of
  that variable differs from its true grade; also the scenario's own
  ``truth_manual_error``);
* the reliability curve of P(grade >= 3) against the truth.

Usage::

    python bench/measure_heldout.py [--cruises 12] [--holdout 3] [--seed 7]
"""

from __future__ import annotations

import argparse
import time

import numpy as np


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--cruises", type=int, default=12)
    ap.add_argument("--holdout", type=int, default=3)
    ap.add_argument("--seed", type=int, default=7)
    ap.add_argument("--folds", type=int, default=4)
    args = ap.parse_args()

    from qcflag.audit import audit, review_queue
    from qcflag.combine import reliability_curve
    from qcflag.learn import train_model
    from qcflag.pipeline import flag_batch
    from qcflag.simulate import simulate_archive

    t0 = time.perf_counter()
    batch = simulate_archive(args.cruises, seed=args.seed)
    cruises = sorted(batch.profiles["cruise"].astype(str).unique())
    rng = np.random.default_rng(args.seed)
    held = sorted(rng.choice(cruises, size=args.holdout, replace=False).tolist())
    is_held = batch.profiles["cruise"].astype(str).isin(held).to_numpy()
    train, test = batch.select(~is_held), batch.select(is_held)
    t1 = time.perf_counter()
    model, _ = train_model(train, folds=args.folds, seed=args.seed)
    t2 = time.perf_counter()
    result = flag_batch(test, model=model)
    t3 = time.perf_counter()
    result_r = flag_batch(test, model=model, target_recall=0.95)
    print(f"scenario: {args.cruises} cruises (seed {args.seed}), {batch.n_levels} levels; "
          f"held out {held}: {test.n_profiles} profiles, {test.n_levels} levels")
    print(f"time: simulate {t1 - t0:.1f} s, train {t2 - t1:.1f} s, flag {t3 - t2:.1f} s "
          f"({test.n_levels / (t3 - t2):,.0f} levels/s)")
    print()
    print("variable     decision              recall(truth>=3)  false alarms(truth=1)  "
          "manual flags: recall / FA")
    for var in ("temperature", "salinity"):
        truth = test.extra[f"truth_{var}_grade"].to_numpy()
        bad, good = truth >= 3, truth == 1
        mg, _ = test.manual_grade(var)
        man = f"{(mg[bad] >= 3).mean():.3f} / {(mg[good] >= 3).mean():.4f}"
        for label, res in (("min expected cost", result), ("target recall 0.95", result_r)):
            g = res[var].grade
            print(f"{var:<12} {label:<21} {(g[bad] >= 3).mean():>16.3f}  "
                  f"{(g[good] >= 3).mean():>21.4f}  {man}")
        p_bad = np.nan_to_num(result[var].proba[:, 2:].sum(axis=1), nan=0.0)
        ok = truth > 0
        thr = np.quantile(p_bad[good], 0.99, method="higher")
        print(f"{var:<12} {'best at 1% FA':<21} {(p_bad[bad] > thr).mean():>16.3f}  "
              f"{(p_bad[good] > thr).mean():>21.4f}  (threshold {thr:.3f})")
        forced = result[var].forced
        print(f"{'':<12} truly bad levels: {bad.sum()}, of which forced: {(forced & bad).sum()}; "
              f"truly good: {good.sum()}; levels with truth: {ok.sum()}")
    print()
    table = audit(test, result)
    top = table.head(100)
    idx = _level_index(test, top)
    var_err = np.array([
        test.manual_grade(v)[0][i] != test.extra[f"truth_{v}_grade"].to_numpy()[i]
        for v, i in zip(top["variable"], idx, strict=True)
    ])
    any_err = test.extra["truth_manual_error"].to_numpy()[idx]
    base = test.extra["truth_manual_error"].to_numpy().mean()
    print(f"audit: {len(table)} rows; top 100 that are real manual mistakes of that variable: "
          f"{var_err.mean():.0%} (scenario truth_manual_error: {any_err.mean():.0%}; "
          f"share of all levels with a manual mistake: {base:.1%})")
    print("top 100 by kind:", top["kind"].value_counts().to_dict())
    q = review_queue(table, test)
    print(f"review queue: {len(q)} profiles; first 5:")
    print(q.head(5).to_string(index=False))
    print()
    for var in ("temperature", "salinity"):
        truth = test.extra[f"truth_{var}_grade"].to_numpy()
        ok = truth > 0
        p_bad = result[var].proba[ok, 2:].sum(axis=1)
        curve = reliability_curve(truth[ok] >= 3, p_bad, n_bins=10)
        print(f"reliability of P(grade >= 3), {var}, held-out truth:")
        print(curve.to_string(index=False, float_format=lambda x: f"{x:.3f}"))


def _level_index(batch, table) -> np.ndarray:
    """Flat level index of each audit row (profile_id + level within the profile)."""
    pos = {(c, p): i for i, (c, p) in enumerate(
        zip(batch.profiles["cruise"].astype(str), batch.profiles["profile_id"].astype(str),
            strict=True))}
    prof = np.array([pos[(c, p)] for c, p in zip(table["cruise"], table["profile_id"],
                                                  strict=True)], dtype=np.int64)
    return batch.offsets[prof] + table["level"].to_numpy(dtype=np.int64)


if __name__ == "__main__":
    main()
