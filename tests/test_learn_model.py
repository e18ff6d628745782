"""Training on a simulated archive (invented data, known truth), CLI train/evaluate/runs."""

from __future__ import annotations

import json

import numpy as np
import pytest
from threadpoolctl import threadpool_limits
from typer.testing import CliRunner

from qcflag.cli import app
from qcflag.learn import load_model, save_model, train_model
from qcflag.learn.model import evaluate_model, labels_for
from qcflag.simulate import SimulationConfig, simulate_archive, write_scenario

CFG = SimulationConfig(casts_per_cruise=5, floats_per_cruise=1, max_cast_pressure=500)


@pytest.fixture(autouse=True)
def _one_thread():
    with threadpool_limits(limits=1):
        yield


@pytest.fixture(scope="module")
def archive():
    return simulate_archive(8, seed=3, config=CFG)


@pytest.fixture(scope="module")
def trained(archive):
    hold = sorted(archive.profiles["cruise"].unique())[-2:]
    with threadpool_limits(limits=1):
        model, report = train_model(archive, estimator="logistic-at", folds=3, seed=0,
                                    holdout_cruises=hold, max_train_levels=5000)
    return model, report, hold


@pytest.fixture(scope="module")
def held_out_scores(archive):
    """Held-out scores of ordinal models and baselines (invented scenario, known truth).

    As in ``bench/measure_heldout.py`` but smaller: the boosted model sees the features on
    the fixed training grid (:func:`qcflag.learn.model.quantise`) and every learned model
    is fitted on a weighted subsample of the good levels, as ``train_model`` does.
    """
    from qcflag.features import build_features
    from qcflag.learn import (
        CumulativeBoostedClassifier,
        NominalLogistic,
        OrdinalLogistic,
        RulesOnly,
        grouped_cross_validate,
    )
    from qcflag.learn.model import quantisation_scales, quantise
    from qcflag.rules import run_checks

    hold = sorted(archive.profiles["cruise"].unique())[-2:]
    checks = run_checks(archive)
    cruise = archive.per_level("cruise").astype(str)
    out = {}
    with threadpool_limits(limits=1):
        for var in ("temperature", "salinity"):
            X, names = build_features(archive, checks, var)
            y = labels_for(archive, var)
            k = y > 0
            models = {
                "logistic-at": OrdinalLogistic(),
                "nominal": NominalLogistic(),
                "rules": RulesOnly(column=names.index("rule_grade")),
            }
            rep = grouped_cross_validate(models, X[k], y[k], cruise[k], folds=2,
                                         holdout=hold, max_train_levels=4000)
            fit = k & ~np.isin(cruise, hold)
            Xq = quantise(X, quantisation_scales(X[fit]))
            rep_b = grouped_cross_validate(
                {"boosted": CumulativeBoostedClassifier(max_iter=40)}, Xq[k], y[k],
                cruise[k], folds=2, holdout=hold, max_train_levels=4000)
            out[var] = {**rep.holdout["grade"], **rep_b.holdout["grade"]}
    return out


def test_labels_exclude_non_ordinal_states(archive):
    y = labels_for(archive, "temperature")
    _grade, state = archive.manual_grade("temperature")
    assert set(np.unique(y)) <= {0, 1, 2, 3, 4}
    assert (y[state != 0] == 0).all()
    assert (y[np.isnan(archive.temperature)] == 0).all()


def test_ordinal_models_beat_nominal_and_rules_on_held_out_cruises(held_out_scores):
    # the simulated scenario is invented data (qcflag.simulate); the claim is relative
    for var, hold in held_out_scores.items():
        best_ordinal_mae = min(hold[m]["mae"] for m in ("boosted", "logistic-at"))
        best_ordinal_qwk = max(hold[m]["qwk"] for m in ("boosted", "logistic-at"))
        for base in ("nominal", "rules"):
            assert best_ordinal_mae < hold[base]["mae"], (var, base, hold)
            assert best_ordinal_qwk > hold[base]["qwk"], (var, base, hold)


def test_model_card_and_round_trip(trained, archive, tmp_path):
    model, _, hold = trained
    card = model.card
    assert card["training_data"]["n_cruises"] == 6
    assert card["training_data"]["holdout_cruises"] == hold
    assert len(card["training_data"]["fingerprint"]) == 64
    assert card["feature_set_version"] == model.feature_set_version
    assert "fusion" in card and set(card["fusion"]) == {"temperature", "salinity"}
    assert "mord" in card["packages"]
    assert card["max_train_levels"] == 5000
    p = save_model(model, tmp_path / "m.qcm")
    back = load_model(p)
    pa, pb = model.predict_proba(archive), back.predict_proba(archive)
    for var in ("temperature", "salinity"):
        np.testing.assert_array_equal(pa[var], pb[var])
        np.testing.assert_allclose(pa[var].sum(axis=1), 1.0, atol=1e-12)
    names, contrib = back.attribution(archive)["temperature"]
    assert contrib.shape == (archive.n_levels, len(names))


def test_evaluate_model_reports_required_keys(trained, archive):
    model, _, _ = trained
    out = evaluate_model(model, archive)
    for var in ("temperature", "salinity"):
        s = out["variables"][var]
        assert {"qwk", "mae", "recall_bad", "false_alarm_rate", "confusion"} <= set(s)
        assert np.array(s["confusion"]).sum() == int((labels_for(archive, var) > 0).sum())
    assert "training data" in out["note"]


def test_no_manual_flags_is_a_clear_error(archive):
    from dataclasses import replace

    from qcflag.exceptions import QCFlagError

    with pytest.raises(QCFlagError, match="no manual temperature or salinity flags"):
        train_model(replace(archive, flags={}), estimator="logistic-at")


def test_cli_train_evaluate_runs(tmp_path):
    files = write_scenario(tmp_path / "data", n_cruises=4, seed=5,
                           config=SimulationConfig(casts_per_cruise=3, floats_per_cruise=0,
                                                   max_cast_pressure=300), formats=("csv",))
    csvs = [str(f) for f in files if f.suffix == ".csv"]
    model = tmp_path / "m.qcm"
    runner = CliRunner()
    res = runner.invoke(app, ["train", *csvs[:3], "--model", str(model),
                              "--estimator", "logistic-at", "--folds", "3"])
    assert res.exit_code == 0, res.output
    assert "logistic-at" in res.output and "rules" in res.output and model.exists()
    # no silent overwrite
    res = runner.invoke(app, ["train", *csvs[:3], "--model", str(model)])
    assert res.exit_code == 1 and "--overwrite" in res.output
    out = tmp_path / "scores.json"
    res = runner.invoke(app, ["evaluate", csvs[3], "--model", str(model), "--json", str(out)])
    assert res.exit_code == 0, res.output
    scores = json.loads(out.read_text())
    assert {"qwk", "mae", "recall_bad", "false_alarm_rate", "confusion"} <= set(
        scores["variables"]["temperature"])
    res = runner.invoke(app, ["runs", "--model", str(model)])
    assert res.exit_code == 0, res.output
    assert "train" in res.output and "evaluate" in res.output
    # a pickle posing as a model: one-line error, exit 1
    evil = tmp_path / "evil.qcm"
    evil.write_bytes(b"\x80\x04K\x01.")
    res = runner.invoke(app, ["evaluate", csvs[3], "--model", str(evil)])
    assert res.exit_code == 1 and "not a qcflag model file" in res.output
    assert "Traceback" not in res.output
    res = runner.invoke(app, ["train", csvs[0], "--model", str(tmp_path / "x.qcm"),
                              "--estimator", "magic"])
    assert res.exit_code == 2


def test_decision_knobs_on_a_trained_model(trained, archive):
    # invented scenario (qcflag.simulate), truth known: a false-alarm rate flags about that
    # share of the truly good held-out levels and loses no recall against the default
    from qcflag.pipeline import flag_batch

    model, _, hold = trained
    test = archive.select(archive.profiles["cruise"].isin(hold).to_numpy())
    default = flag_batch(test, model=model)
    fa = flag_batch(test, model=model, false_alarm_rate=0.02)
    for var in ("temperature", "salinity"):
        truth = test.extra[f"truth_{var}_grade"].to_numpy()
        good, bad = truth == 1, truth >= 3
        assert (fa[var].grade[good] >= 3).mean() < 0.04
        assert (fa[var].grade[bad] >= 3).mean() >= (default[var].grade[bad] >= 3).mean()
        assert model.card["fusion"][var]["pass_quantiles"]  # stored with the model


def test_cv_class_weighting_takes_the_lowest_cross_validated_error(archive):
    """``class_weight="cv"`` picks, per variable, the weighting whose grouped-CV MAE (on the
    training cruises only) is lowest, records the scores, and fits the model with it."""
    from sklearn.base import clone

    from qcflag.features import build_features
    from qcflag.learn.evaluation import grouped_cross_validate
    from qcflag.learn.model import _WEIGHT_PARAM
    from qcflag.rules import run_checks

    hold = sorted(archive.profiles["cruise"].unique())[-2:]
    model, _ = train_model(archive, estimator="logistic-at", folds=3, seed=0,
                           holdout_cruises=hold, max_train_levels=5000, class_weight="cv",
                           fusion=False)
    scores = model.card["class_weight_cv_mae"]
    assert set(scores) == {"temperature", "salinity"}
    # the same cross-validation, run here on the training cruises only
    checks = run_checks(archive)
    cruise = archive.per_level("cruise").astype(str)
    for var in ("temperature", "salinity"):
        X, _ = build_features(archive, checks, var)
        y = labels_for(archive, var)
        rows = (y > 0) & ~np.isin(cruise, hold)
        est = model.estimators[var]
        cands = {k: clone(est).set_params(class_weight=v) for k, v in _WEIGHT_PARAM.items()}
        rep = grouped_cross_validate(cands, X[rows], y[rows], cruise[rows], folds=3, seed=0,
                                     max_train_levels=5000)
        mine = {k: float(np.mean([f["mae"] for f in rep.folds["grade"][k]])) for k in cands}
        assert scores[var] == pytest.approx(mine, rel=1e-12)
        best = min(mine, key=mine.__getitem__)
        assert model.card["class_weight"][var] == best
        assert _fitted_weighting(est, y[rows]) == best
    assert len({tuple(v.values()) for v in scores.values()}) == 2  # scored per variable


def _fitted_weighting(est, y):
    """Which weighting the final fit used: the subsample's compensating class weights
    (:func:`majority_subsample`, 5,000 levels, seed 0) are compared with each candidate's."""
    from qcflag.learn.evaluation import majority_subsample
    from qcflag.learn.model import _WEIGHT_PARAM

    got = est.get_params()["class_weight"]
    assert isinstance(got, dict)  # the archive is larger than the 5,000-level subsample
    match = [k for k, v in _WEIGHT_PARAM.items()
             if majority_subsample(y, 5000, seed=0, class_weight=v)[1] == got]
    assert len(match) == 1
    return match[0]


def test_fixed_class_weighting_and_bad_values(archive):
    from qcflag.exceptions import QCFlagError

    model, _ = train_model(archive, estimator="logistic-at", folds=2, seed=0,
                           max_train_levels=5000, class_weight="balanced", fusion=False)
    assert model.card["class_weight"] == {"temperature": "balanced", "salinity": "balanced"}
    assert "class_weight_cv_mae" not in model.card
    y = {v: labels_for(archive, v) for v in model.estimators}
    assert all(_fitted_weighting(e, y[v][y[v] > 0]) == "balanced"
               for v, e in model.estimators.items())
    model, _ = train_model(archive, estimator="logistic-at", folds=2, seed=0,
                           max_train_levels=5000, fusion=False)
    assert model.card["class_weight"] == {"temperature": "sqrt", "salinity": "sqrt"}
    with pytest.raises(QCFlagError, match="unknown class weighting 'heavy'"):
        train_model(archive, estimator="logistic-at", class_weight="heavy")
    with pytest.raises(QCFlagError, match="class weighting once"):
        train_model(archive, estimator="logistic-at", class_weight="none",
                    estimator_params={"class_weight": None})


def test_cli_class_weight_option(tmp_path):
    files = write_scenario(tmp_path / "data", n_cruises=4, seed=5,
                           config=SimulationConfig(casts_per_cruise=3, floats_per_cruise=0,
                                                   max_cast_pressure=300), formats=("csv",))
    csvs = [str(f) for f in files if f.suffix == ".csv"]
    runner = CliRunner()
    model = tmp_path / "m.qcm"
    res = runner.invoke(app, ["train", *csvs, "--model", str(model), "--estimator",
                              "logistic-at", "--folds", "2", "--class-weight", "cv"])
    assert res.exit_code == 0, res.output
    card = load_model(model).card
    for var in ("temperature", "salinity"):
        assert f"class weighting, {var}: {card['class_weight'][var]}" in res.output
    res = runner.invoke(app, ["train", *csvs, "--model", str(tmp_path / "x.qcm"),
                              "--class-weight", "heavy"])
    assert res.exit_code == 2 and "--class-weight" in res.output
    assert not (tmp_path / "x.qcm").exists()
