"""Choose the training setup of the demo by grouped CV on its training cruises only.

The held-out cruises of ``qcflag demo`` (the last third) are never simulated into this
script's scoring: it splits the *training* cruises into ``--outer`` groups of whole cruises,
and for each candidate setup (``max_train_levels`` x boosted ``class_weight``) and each
group trains :func:`qcflag.learn.train_model` (its own inner grouped CV fits the fusion and
the target-recall threshold) on the other training cruises, flags the group, and scores the
flags against the simulation's truth of those training cruises: recall of truly
probably-bad-or-bad levels and false alarms on truly good levels, for the minimum-cost flag
and the target-recall-0.95 flag, per variable.

Selection rule: among setups whose pooled false-alarm rate of the minimum-cost flag is at
most 1% for both variables, take the highest minimum (over variables) recall of that flag;
ties (within 0.005) go to the smaller ``max_train_levels`` (faster). (A first version also
required the target-recall-0.95 flag to stay under 1% false alarms; on the first candidate
that flag raised 80-99% false alarms on the training folds -- its threshold is set on the
manual "bad" labels, which include the operators' mistakes -- so no setup could pass and the
rule was narrowed to the minimum-cost flag. Only training cruises were looked at.)

Usage::

    python bench/select_training.py            # demo scenario (12 cruises, seed 0)
"""

from __future__ import annotations

import argparse
import itertools
import time

import numpy as np


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--cruises", type=int, default=12)
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--outer", type=int, default=2)
    ap.add_argument("--folds", type=int, default=3, help="inner folds of train_model")
    args = ap.parse_args()

    from threadpoolctl import threadpool_limits

    from qcflag.demo import demo_config
    from qcflag.learn import train_model
    from qcflag.pipeline import flag_batch
    from qcflag.simulate import simulate_archive

    limits = threadpool_limits(limits=1)
    batch = simulate_archive(args.cruises, seed=args.seed, config=demo_config())
    cruises = list(dict.fromkeys(batch.profiles["cruise"].astype(str)))
    n_hold = max(1, args.cruises // 3)
    training = cruises[:-n_hold]  # the held-out cruises are dropped here, never scored
    pc = batch.profiles["cruise"].astype(str)
    groups = [training[i::args.outer] for i in range(args.outer)]
    grid = list(itertools.product((4_000, 40_000), ("sqrt", "balanced")))
    print(f"training cruises {training}; outer groups {groups}")
    print(f"{'max_train':>9} {'weights':<9} {'var':<12} {'rec(min cost)':>13} "
          f"{'FA(min cost)':>12} {'rec(t=0.95)':>11} {'FA(t=0.95)':>10}")
    scores = {}
    for mtl, cw in grid:
        t0 = time.perf_counter()
        acc: dict[str, dict[str, list[np.ndarray]]] = {}
        for g in groups:
            fit = batch.select(pc.isin(training).to_numpy() & ~pc.isin(g).to_numpy())
            val = batch.select(pc.isin(g).to_numpy())
            model, _ = train_model(fit, folds=args.folds, seed=args.seed,
                                   max_train_levels=mtl,
                                   estimator_params={"class_weight": cw})
            r0 = flag_batch(val, model=model)
            r1 = flag_batch(val, model=model, target_recall=0.95)
            for var in ("temperature", "salinity"):
                truth = val.extra[f"truth_{var}_grade"].to_numpy()
                a = acc.setdefault(var, {"t": [], "g0": [], "g1": []})
                a["t"].append(truth)
                a["g0"].append(r0[var].grade)
                a["g1"].append(r1[var].grade)
        row = {}
        for var, a in acc.items():
            t = np.concatenate(a["t"])
            bad, good = t >= 3, t == 1
            vals = []
            for k in ("g0", "g1"):
                gr = np.concatenate(a[k])
                vals += [float((gr[bad] >= 3).mean()), float((gr[good] >= 3).mean())]
            row[var] = vals
            print(f"{mtl:>9} {cw:<9} {var:<12} {vals[0]:>13.3f} {vals[1]:>12.4f} "
                  f"{vals[2]:>11.3f} {vals[3]:>10.4f}")
        print(f"  ({time.perf_counter() - t0:.0f} s)", flush=True)
        scores[(mtl, cw)] = row
    ok = {k: min(v[0] for v in r.values()) for k, r in scores.items()
          if max(v[1] for v in r.values()) <= 0.01}
    if not ok:
        print("no setup kept false alarms <= 1%")
        return
    best = max(ok.values())
    chosen = min((k for k, v in ok.items() if v >= best - 0.005), key=lambda k: k[0])
    print(f"chosen: max_train_levels={chosen[0]}, class_weight={chosen[1]} "
          f"(min recall, minimum-cost flag: {ok[chosen]:.3f})")
    limits.restore_original_limits()


if __name__ == "__main__":
    main()
