"""The end-to-end demo: simulate, train, evaluate, flag, audit, report.

:func:`run_demo` walks the whole job on the invented Solvaig Margin Programme (see
:mod:`qcflag.simulate`): it writes the scenario's files, trains a model on the manual flags
of the first cruises, scores it on the held-out cruises (against their manual flags and
against the simulation's known truth), writes the held-out cruises with automatic flags
added, audits the disagreements and writes the per-cruise reports. Everything lands in one
folder, built beside the target and renamed into place at the end.

The data are invented; the demo shows the workflow, not the skill qcflag would have on a
real archive. Automated flags assist expert QC and do not replace it.
"""

from __future__ import annotations

import contextlib
import json
import os
import shutil
import sys
import tempfile
import time
from collections.abc import Callable
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from qcflag.exceptions import OutputExistsError, QCFlagError
from qcflag.schemes import State

if TYPE_CHECKING:
    from qcflag.profiles import ProfileBatch
    from qcflag.result import FlagResult
    from qcflag.simulate import SimulationConfig

__all__ = ["DemoSummary", "demo_config", "evaluate_holdout", "run_demo"]


@dataclass
class DemoSummary:
    """Where the demo put everything, and what it measured.

    Attributes
    ----------
    out_dir : Path
        The demo folder.
    index_html : Path
        The report index to open in a browser.
    data_dir, model_path, evaluation_path, flagged_dir, audit_path, reports_dir : Path
        The simulated input files, the trained model, the hold-out evaluation (JSON), the
        held-out cruises with automatic flags, the audit table (CSV) and the reports.
    train_cruises, holdout_cruises : list of str
        How the cruises were split.
    n_profiles, n_levels : int
        Size of the whole simulated archive.
    evaluation : dict
        The hold-out evaluation also written to `evaluation_path`.
    seconds : dict of str to float
        Wall-clock time of each step.
    """

    out_dir: Path
    index_html: Path
    data_dir: Path
    model_path: Path
    evaluation_path: Path
    flagged_dir: Path
    audit_path: Path
    reports_dir: Path
    train_cruises: list[str]
    holdout_cruises: list[str]
    n_profiles: int
    n_levels: int
    evaluation: dict[str, Any] = field(default_factory=dict)
    seconds: dict[str, float] = field(default_factory=dict)

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready summary (paths as strings, evaluation omitted)."""
        out: dict[str, Any] = {}
        for k, v in self.__dict__.items():
            if k == "evaluation":
                continue
            out[k] = str(v) if isinstance(v, Path) else v
        return out


def demo_config(*, small: bool = False) -> SimulationConfig:
    """Return the simulation sizes of the demo.

    Parameters
    ----------
    small : bool, default=False
        A tiny archive for the test suite (a few casts per cruise, shallow, coarse bins).

    Returns
    -------
    SimulationConfig
        Default: 16 CTD casts per cruise to 800 dbar at 2 dbar bins plus one float with
        three cycles to 1000 dbar, default fault rates: about 6,000 levels per cruise, so
        the held-out cruises hold enough faults to score; training with cross-validation
        takes well under a minute on two cores.
    """
    from qcflag.simulate import SimulationConfig

    if small:
        return SimulationConfig(casts_per_cruise=4, floats_per_cruise=1, cycles_per_float=2,
                                ctd_spacing=5.0, max_cast_pressure=500.0,
                                float_max_pressure=500.0)
    return SimulationConfig(casts_per_cruise=16, floats_per_cruise=1, cycles_per_float=3,
                            ctd_spacing=2.0, max_cast_pressure=800.0,
                            float_max_pressure=1000.0)


# ------------------------------------------------------------------------ evaluation
def _truth_grade(batch: ProfileBatch, variable: str) -> np.ndarray | None:
    col = f"truth_{variable}_grade"
    if batch.extra is None or col not in batch.extra.columns:
        return None
    return np.nan_to_num(batch.extra[col].to_numpy(dtype=float), nan=0).astype(np.int64)


def _grade_scores(truth: np.ndarray, pred: np.ndarray) -> dict[str, Any]:
    from qcflag.learn.metrics import confusion, flag_rates, quadratic_weighted_kappa

    cm = confusion(truth, pred)
    recall_bad, false_alarm = flag_rates(cm)
    return {
        "n": int(truth.size),
        "accuracy": float(np.trace(cm) / cm.sum()) if cm.sum() else None,
        "qwk": quadratic_weighted_kappa(cm),
        "recall_bad": recall_bad,
        "false_alarm_rate": false_alarm,
        "confusion": cm.tolist(),
    }


def evaluate_holdout(batch: ProfileBatch, result: FlagResult) -> dict[str, Any]:
    """Score automatic flags on held-out cruises against manual flags and, if known, truth.

    Parameters
    ----------
    batch : ProfileBatch
        Held-out profiles with manual flags (and, for simulated data, ``truth_<var>_grade``
        columns in ``extra``).
    result : FlagResult
        Automatic flags of `batch`.

    Returns
    -------
    dict
        Per variable: ``against_manual`` (automatic vs manual grades), and where truth is
        known ``automatic_vs_truth`` and ``manual_vs_truth`` (so the model can be compared
        with the operators who flagged the data). Each holds ``n``, ``accuracy``, ``qwk``
        (quadratic weighted kappa), ``recall_bad`` and ``false_alarm_rate`` (of grade >= 3)
        and the 4 x 4 ``confusion`` (rows: reference grade 1-4).
    """
    out: dict[str, Any] = {}
    for var in ("temperature", "salinity"):
        if var not in result.variables:
            continue
        vf = result[var]
        auto_ok = (vf.state == State.ASSESSED) & (vf.grade >= 1)
        auto = vf.grade.astype(np.int64)
        mg, ms = batch.manual_grade(var)
        man_ok = (ms == State.ASSESSED) & (mg >= 1)
        scores: dict[str, Any] = {}
        both = auto_ok & man_ok
        scores["against_manual"] = _grade_scores(mg[both].astype(np.int64), auto[both])
        truth = _truth_grade(batch, var)
        if truth is not None:
            t_ok = truth >= 1
            sel = t_ok & auto_ok
            scores["automatic_vs_truth"] = _grade_scores(truth[sel], auto[sel])
            sel = t_ok & man_ok
            scores["manual_vs_truth"] = _grade_scores(truth[sel], mg[sel].astype(np.int64))
        out[var] = scores
    return out


# ------------------------------------------------------------------------ the demo
def _one_thread() -> contextlib.AbstractContextManager[Any]:
    """Limit OpenMP/BLAS thread pools to one thread while the demo runs.

    On a two-core machine shared with other work, scikit-learn's OpenMP gradient boosting
    slowed down about 60-fold with its default two threads (measured: 60 s against 1 s for
    one 1000-level fit at load average ~6), so the demo trades at most a factor of two on
    an idle machine for never stalling on a busy one.
    """
    try:
        from threadpoolctl import threadpool_limits
    except ImportError:  # pragma: no cover - threadpoolctl comes with scikit-learn
        return contextlib.nullcontext()
    return threadpool_limits(limits=1)


def _say(progress: bool | Callable[[str], None]) -> Callable[[str], None]:
    if callable(progress):
        return progress
    if progress:
        return lambda msg: print(msg, file=sys.stderr, flush=True)
    return lambda msg: None


def run_demo(
    out_dir: str | os.PathLike[str] = "qcflag-demo",
    *,
    n_cruises: int = 12,
    seed: int = 0,
    small: bool = False,
    progress: bool | Callable[[str], None] = True,
    overwrite: bool = False,
) -> DemoSummary:
    """Run the whole job once on a simulated archive.

    Steps: simulate and write the scenario (``data/``), read it back, train on the first
    cruises with grouped cross-validation (``model.qcm``), flag the held-out cruises and
    score them (``evaluation.json``), write them with automatic flag columns
    (``flagged/``), audit disagreements with their manual flags (``audit.csv``) and write
    the reports (``reports/index.html``). ``demo.json`` records the split and timings.

    Parameters
    ----------
    out_dir : path-like, default="qcflag-demo"
        Folder to create.
    n_cruises : int, default=12
        Cruises to simulate (at least 3); the last third (at least one) are held out. Twelve
        leave four held-out cruises (about 23,000 levels), enough faults and manual mistakes
        for the held-out figures of ``bench/measure_heldout.py`` to mean something.
    seed : int, default=0
        Seed of the simulation, the folds and the model.
    small : bool, default=False
        Use a tiny archive, two folds and the (fast) ordinal logistic model instead of the
        boosted one (for tests; see :func:`demo_config`).
    progress : bool or callable, default=True
        Report each step on stderr (or pass each message to the callable).
    overwrite : bool, default=False
        Replace an existing `out_dir`.

    Returns
    -------
    DemoSummary

    Raises
    ------
    OutputExistsError
        If `out_dir` exists and `overwrite` is false.
    QCFlagError
        If `n_cruises` is below 3.
    """
    from qcflag.audit import audit, write_audit
    from qcflag.io import read_files, write
    from qcflag.learn import save_model, train_model
    from qcflag.pipeline import flag_batch, flagged_columns
    from qcflag.report import write_reports
    from qcflag.report.html import move_into_place, to_jsonable
    from qcflag.rules import load_rules
    from qcflag.simulate import write_scenario

    if isinstance(n_cruises, bool) or not isinstance(n_cruises, (int, np.integer)) \
            or n_cruises < 3:
        raise QCFlagError(f"demo: --cruises must be at least 3 (two to train, one to hold "
                          f"out), got {n_cruises!r}")
    out = Path(out_dir)
    if out.exists() and not overwrite:
        raise OutputExistsError(f"{out}: output exists; pass --overwrite to replace it")
    if out.exists() and not out.is_dir():
        raise OutputExistsError(f"{out}: exists and is not a folder; choose another --out")
    say = _say(progress)
    stack = contextlib.ExitStack()
    seconds: dict[str, float] = {}
    out.parent.mkdir(parents=True, exist_ok=True)
    work = Path(tempfile.mkdtemp(prefix=f".{out.name}.tmp-", dir=out.parent))
    t_all = time.perf_counter()
    try:
        stack.enter_context(_one_thread())
        t0 = time.perf_counter()
        say(f"[1/6] simulating {n_cruises} cruises of the invented Solvaig Margin Programme "
            f"(seed {seed}) ...")
        cfg = demo_config(small=small)
        files = write_scenario(work / "data", n_cruises=int(n_cruises), seed=int(seed),
                               config=cfg, formats=("csv",))
        csvs = [f for f in files if f.suffix == ".csv"]
        n_hold = max(1, int(n_cruises) // 3)
        train_files, hold_files = csvs[:-n_hold], csvs[-n_hold:]
        seconds["simulate"] = time.perf_counter() - t0

        t0 = time.perf_counter()
        train = read_files(train_files)
        hold = read_files(hold_files)
        for b in (train, hold):  # record where the files will be, not the build folder
            b.attrs["sources"] = [
                str(out / Path(f).relative_to(work)) if Path(f).is_relative_to(work) else f
                for f in b.attrs.get("sources", [])
            ]
        train_cruises = list(dict.fromkeys(train.profiles["cruise"].astype(str)))
        hold_cruises = list(dict.fromkeys(hold.profiles["cruise"].astype(str)))
        say(f"[2/6] training on {len(train_cruises)} cruises ({train.n_levels} levels) with "
            "grouped cross-validation ...")
        rules = load_rules(None)
        folds = 2 if small else min(3, len(train_cruises))
        model, cv = train_model(train, folds=folds, seed=int(seed), rules=rules,
                                estimator="logistic-at" if small else "boosted")
        model_path = save_model(model, work / "model.qcm")
        seconds["train"] = time.perf_counter() - t0

        t0 = time.perf_counter()
        say(f"[3/6] flagging and scoring the {len(hold_cruises)} held-out cruises "
            f"({', '.join(hold_cruises)}) ...")
        result = flag_batch(hold, model=model, rules=rules)
        evaluation = {
            "note": "Invented data: scores show the workflow, not skill on a real archive.",
            "holdout_cruises": hold_cruises,
            "train_cruises": train_cruises,
            "holdout": evaluate_holdout(hold, result),
            "cross_validation": cv.to_dict(),
        }
        eval_path = work / "evaluation.json"
        eval_path.write_text(json.dumps(to_jsonable(evaluation), indent=1) + "\n",
                             encoding="utf-8")
        seconds["evaluate"] = time.perf_counter() - t0

        t0 = time.perf_counter()
        say("[4/6] writing the held-out cruises with automatic flags ...")
        added = flagged_columns(hold, result)
        cruise_of_level = hold.per_level("cruise").astype(str)
        cruise_of_profile = hold.profiles["cruise"].astype(str).to_numpy()
        (work / "flagged").mkdir()
        for c in hold_cruises:  # one file per held-out cruise
            lm = cruise_of_level == c
            write(hold.select(cruise_of_profile == c), work / "flagged" / f"{c}.csv",
                  added={k: replace(col, values=np.asarray(col.values)[lm])
                         for k, col in added.items()},
                  history="qcflag demo")
        seconds["flag"] = time.perf_counter() - t0

        t0 = time.perf_counter()
        say("[5/6] auditing disagreements with the manual flags ...")
        table = audit(hold, result)
        audit_path = write_audit(table, work / "audit.csv")
        seconds["audit"] = time.perf_counter() - t0

        t0 = time.perf_counter()
        say("[6/6] writing the per-cruise reports ...")
        write_reports(hold, result, out_dir=work / "reports", audit_table=table,
                      model_card=model.card, rules=rules)
        seconds["report"] = time.perf_counter() - t0
        seconds["total"] = time.perf_counter() - t_all

        n_prof = train.n_profiles + hold.n_profiles
        n_lev = train.n_levels + hold.n_levels
        summary = DemoSummary(
            out_dir=out, index_html=out / "reports" / "index.html", data_dir=out / "data",
            model_path=out / model_path.name, evaluation_path=out / "evaluation.json",
            flagged_dir=out / "flagged", audit_path=out / audit_path.name,
            reports_dir=out / "reports", train_cruises=train_cruises,
            holdout_cruises=hold_cruises, n_profiles=n_prof, n_levels=n_lev,
            evaluation=evaluation, seconds={k: round(v, 2) for k, v in seconds.items()},
        )
        (work / "demo.json").write_text(
            json.dumps({**summary.to_dict(), "seed": int(seed), "n_cruises": int(n_cruises),
                        "small": bool(small)}, indent=1) + "\n", encoding="utf-8")
        move_into_place(work, out, overwrite=overwrite)
    except BaseException:
        shutil.rmtree(work, ignore_errors=True)
        raise
    finally:
        stack.close()
    say(f"done in {seconds['total']:.0f} s. Open the reports in a browser:\n  "
        f"{summary.index_html.resolve()}")
    return summary
