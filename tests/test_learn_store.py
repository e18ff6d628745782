"""Model store: round trip, refusal of tampered and malicious files, runs log, CV grouping."""

from __future__ import annotations

import io
import json
import pickle
import zipfile

import numpy as np
import pytest
from threadpoolctl import threadpool_limits

from qcflag.exceptions import ModelFileError, OutputExistsError, QCFlagError
from qcflag.learn import (
    CumulativeBoostedClassifier,
    NominalLogistic,
    OrdinalLogistic,
    QCModel,
    RulesOnly,
    grouped_cross_validate,
    list_runs,
    load_model,
    log_run,
    save_model,
)
from qcflag.learn.evaluation import make_folds
from qcflag.learn.store import FORMAT_VERSION


def _data(n=900, seed=0):
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n, 4))
    y = np.digitize(X[:, 0] + 0.3 * rng.logistic(size=n), [0.7, 1.3, 1.9]) + 1
    X[rng.random(X.shape) < 0.05] = np.nan
    return X, y


@pytest.fixture(scope="module")
def model():
    X, y = _data()
    names = ["a", "b", "c", "rule_grade"]
    with threadpool_limits(limits=1):
        est_t = CumulativeBoostedClassifier(max_iter=8).fit(X, y)
        est_s = OrdinalLogistic().fit(X, y)
    return QCModel(estimators={"temperature": est_t, "salinity": est_s},
                   feature_names={"temperature": names, "salinity": names},
                   card={"note": "test", "cv": {"mae": 0.1}})


def test_round_trip_gives_identical_predictions(model, tmp_path):
    X, _ = _data(seed=5)
    path = save_model(model, tmp_path / "m.qcm")
    back = load_model(path)
    for var in ("temperature", "salinity"):
        np.testing.assert_array_equal(back.estimators[var].predict_proba(X),
                                      model.estimators[var].predict_proba(X))
        np.testing.assert_array_equal(back.estimators[var].predict(X),
                                      model.estimators[var].predict(X))
        np.testing.assert_array_equal(back.estimators[var].contributions(X),
                                      model.estimators[var].contributions(X))
    assert back.card == model.card
    assert back.feature_names == model.feature_names


@pytest.mark.parametrize("make", [lambda: NominalLogistic(), lambda: RulesOnly(column=3),
                                  lambda: OrdinalLogistic("it")])
def test_round_trip_other_estimators(make, tmp_path):
    X, y = _data()
    est = make().fit(X, y)
    m = QCModel(estimators={"temperature": est}, feature_names={"temperature": list("abcd")})
    back = load_model(save_model(m, tmp_path / "x.qcm"))
    np.testing.assert_array_equal(back.estimators["temperature"].predict_proba(X),
                                  est.predict_proba(X))


def test_no_overwrite_without_flag(model, tmp_path):
    p = save_model(model, tmp_path / "m.qcm")
    with pytest.raises(OutputExistsError):
        save_model(model, p)
    save_model(model, p, overwrite=True)


def _rewrite(path, out, change):
    """Copy a model archive, letting `change(members)` edit the member dict."""
    with zipfile.ZipFile(path) as zf:
        members = {n: zf.read(n) for n in zf.namelist()}
    change(members)
    with zipfile.ZipFile(out, "w") as zf:
        for k, v in members.items():
            zf.writestr(k, v)
    return out


def test_tampered_array_is_refused(model, tmp_path):
    p = save_model(model, tmp_path / "m.qcm")

    def flip(members):
        name = next(k for k in members if k.endswith("coef_.npy"))
        arr = np.load(io.BytesIO(members[name]))
        buf = io.BytesIO()
        np.save(buf, arr * 2)
        members[name] = buf.getvalue()

    bad = _rewrite(p, tmp_path / "bad.qcm", flip)
    with pytest.raises(ModelFileError, match="integrity hash"):
        load_model(bad)


def test_tampered_json_is_refused(model, tmp_path):
    p = save_model(model, tmp_path / "m.qcm")

    def edit(members):
        meta = json.loads(members["model.json"])
        meta["card"]["note"] = "edited"
        members["model.json"] = json.dumps(meta).encode()

    with pytest.raises(ModelFileError, match="integrity hash"):
        load_model(_rewrite(p, tmp_path / "bad.qcm", edit))


class _Payload:
    """Unpickling this creates the marker file (what a malicious model would do)."""

    def __init__(self, marker):
        self.marker = str(marker)

    def __reduce__(self):
        return (open, (self.marker, "w"))


def test_pickle_file_is_refused_without_running_it(tmp_path):
    marker = tmp_path / "pwned"
    bad = tmp_path / "evil.qcm"
    bad.write_bytes(pickle.dumps(_Payload(marker)))
    with pytest.raises(ModelFileError, match="not a qcflag model file"):
        load_model(bad)
    assert not marker.exists()


def test_object_array_with_pickle_payload_is_refused(model, tmp_path):
    marker = tmp_path / "pwned2"
    p = save_model(model, tmp_path / "m.qcm")

    def inject(members):
        name = next(k for k in members if k.endswith("coef_.npy"))
        buf = io.BytesIO()
        np.save(buf, np.array([_Payload(marker)], dtype=object), allow_pickle=True)
        members[name] = buf.getvalue()
        # an attacker can recompute the hashes: the loader must still refuse
        from qcflag.learn.store import _digest
        body = {k: v for k, v in members.items() if k != "integrity.json"}
        per, digest = _digest(body)
        members["integrity.json"] = json.dumps(
            {"algorithm": "sha256", "members": per, "digest": digest}).encode()

    bad = _rewrite(p, tmp_path / "bad.qcm", inject)
    with pytest.raises(ModelFileError, match=r"cannot be read safely|disallowed"):
        load_model(bad)
    assert not marker.exists()


def _rehash(members):
    from qcflag.learn.store import _digest
    body = {k: v for k, v in members.items() if k != "integrity.json"}
    per, digest = _digest(body)
    members["integrity.json"] = json.dumps(
        {"algorithm": "sha256", "members": per, "digest": digest}).encode()


@pytest.mark.parametrize("edit, match", [
    (lambda meta: meta.update(extra=1), "unknown keys"),
    (lambda meta: meta["variables"]["temperature"].update(estimator="os.system"),
     "unknown estimator"),
    (lambda meta: meta["variables"]["temperature"]["state"]["params"].update(evil=1),
     "unknown estimator parameters"),
    (lambda meta: meta.update(format_version=FORMAT_VERSION + 1), "newer than this qcflag"),
])
def test_unknown_content_is_refused_even_with_valid_hash(model, tmp_path, edit, match):
    p = save_model(model, tmp_path / "m.qcm")

    def change(members):
        meta = json.loads(members["model.json"])
        edit(meta)
        members["model.json"] = json.dumps(meta).encode()
        _rehash(members)

    with pytest.raises(ModelFileError, match=match):
        load_model(_rewrite(p, tmp_path / "bad.qcm", change))


def test_unexpected_member_and_bad_tree_are_refused(model, tmp_path):
    p = save_model(model, tmp_path / "m.qcm")

    def add(members):
        members["payload.pkl"] = pickle.dumps(1)

    with pytest.raises(ModelFileError, match="unexpected member"):
        load_model(_rewrite(p, tmp_path / "bad.qcm", add))

    def loop(members):  # a child pointing back at the root would never terminate
        name = next(k for k in members if k.endswith("t0_left.npy"))
        arr = np.load(io.BytesIO(members[name]))
        arr[arr > 0] = 0
        buf = io.BytesIO()
        np.save(buf, arr)
        members[name] = buf.getvalue()
        _rehash(members)

    with pytest.raises(ModelFileError, match="inconsistent"):
        load_model(_rewrite(p, tmp_path / "bad2.qcm", loop))


def test_missing_model_file(tmp_path):
    with pytest.raises(ModelFileError, match="no such model file"):
        load_model(tmp_path / "nope.qcm")


def test_runs_log(tmp_path):
    db = tmp_path / "runs.sqlite"
    i = log_run(db, command="train", model_path=tmp_path / "m.qcm",
                metrics={"temperature": {"mae": 0.1, "qwk": float("nan")}},
                data_fingerprint="ab" * 32, n_levels=10)
    j = log_run(db, command="evaluate", model_path=tmp_path / "m.qcm", metrics={"x": 1})
    runs = list_runs(db)
    assert list(runs["id"]) == [i, j]
    assert list(runs["command"]) == ["train", "evaluate"]
    assert runs["metrics"][0]["temperature"]["qwk"] is None
    assert runs["time_utc"][0].endswith("Z")
    with pytest.raises(QCFlagError, match="no runs database"):
        list_runs(tmp_path / "none.sqlite")


# ------------------------------------------------------------------ grouped CV
def test_grouped_cv_never_splits_a_cruise():
    _X, y = _data(n=1200)
    groups = np.repeat([f"C{i:02d}" for i in range(12)], 100)
    rng = np.random.default_rng(0)
    rng.shuffle(groups)
    for folds in (3, 5):
        splits, method = make_folds(y, groups, folds, seed=1)
        assert method == "StratifiedGroupKFold"
        seen = []
        for tr, va in splits:
            assert not set(groups[tr]) & set(groups[va])
            assert len(tr) + len(va) == y.size
            seen.extend(va)
        assert sorted(seen) == list(range(y.size))  # every level validated exactly once


def test_grouped_cv_report_and_holdout():
    X, y = _data(n=1200)
    groups = np.repeat(np.arange(8), 150)
    with threadpool_limits(limits=1):
        rep = grouped_cross_validate(
            {"at": OrdinalLogistic(max_iter=80), "rules": RulesOnly(column=0)}, X, y, groups,
            folds=3, holdout=[7], oof_models=["at"])
    info = rep.info["grade"]
    assert info["n_folds"] == 3 and info["holdout_groups"] == [7]
    for fold in info["fold_groups"]:
        assert 7 not in fold
    tab = rep.table()
    assert {"mae", "qwk", "roc_auc", "mae_sd", "mae_holdout"} <= set(tab.columns)
    assert tab.loc[("grade", "at"), "mae"] < tab.loc[("grade", "rules"), "mae"]
    oof = rep.oof["grade"]["at"]
    assert np.isnan(oof[groups == 7]).all() and np.isfinite(oof[groups != 7]).all()
    d = json.loads(rep.to_json())
    assert len(d["folds"]["grade"]["at"]) == 3
    assert "at" in rep.to_text()


def test_cv_needs_two_cruises():
    X, y = _data(n=50)
    with pytest.raises(QCFlagError, match="at least 2 cruises"):
        grouped_cross_validate({"r": RulesOnly(column=0)}, X, y, np.zeros(50))
