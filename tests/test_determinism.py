"""Determinism: the same inputs, options and seed give byte-identical outputs.

NetCDF history lines and ``date_created`` carry the run time; with ``SOURCE_DATE_EPOCH``
set (the reproducible-builds convention, reproducible-builds.org) they use that time, so
reruns are byte-identical. The runs are a second apart so a clock-dependent output would
differ.
"""

from __future__ import annotations

import time
from pathlib import Path

import netCDF4
import numpy as np
import pytest
from typer.testing import CliRunner

from qcflag.cli import app
from qcflag.io import read_files, write
from qcflag.learn import load_model, save_model, train_model
from qcflag.rules import run_checks
from qcflag.simulate import SimulationConfig, simulate_archive
from qcflag.testing import file_digests

TINY = SimulationConfig(casts_per_cruise=2, floats_per_cruise=0, max_cast_pressure=100.0)
EPOCH = "1700000000"  # 2023-11-14T22:13:20Z


def _run(args, env=None):
    result = CliRunner().invoke(app, [str(a) for a in args], env=env)
    assert result.exit_code == 0, (result.output, result.exception)
    return result


def _twice(tmp: Path, make_args, env=None) -> tuple[dict[str, str], dict[str, str]]:
    """Run a command into two fresh folders a second apart; digests keyed by relative name."""
    out = []
    d = tmp / "run"  # same output path both times: it is recorded in NetCDF history
    for k in ("a", "b"):
        d.mkdir()
        _run(make_args(d), env)
        out.append({str(Path(p).relative_to(d)): h for p, h in file_digests([d]).items()})
        d.rename(tmp / k)
        time.sleep(1.05)
    return out[0], out[1]


@pytest.fixture(scope="module")
def archive(tmp_path_factory):
    root = tmp_path_factory.mktemp("det")
    batch = simulate_archive(3, seed=11, config=TINY)
    for cruise in batch.profiles["cruise"].unique():
        sub = batch.select(np.flatnonzero(batch.profiles["cruise"].to_numpy() == cruise))
        write(sub, root / f"{cruise}.csv")
    return root


@pytest.fixture(scope="module")
def model(archive, tmp_path_factory):
    train = read_files(sorted(archive.glob("*.csv"))[:2])
    m, _ = train_model(train, estimator="logistic-at", folds=2, seed=0, fusion=False)
    return save_model(m, tmp_path_factory.mktemp("m") / "tiny.qcm")


@pytest.mark.parametrize("suffix", [".csv", ".nc"])
def test_flag_outputs_byte_identical(archive, model, tmp_path, suffix):
    src = sorted(archive.glob("*.csv"))[-1]
    a, b = _twice(tmp_path, lambda d: ["flag", src, "--model", model, "--probabilities",
                                       "--out", d / f"o{suffix}"], {"SOURCE_DATE_EPOCH": EPOCH})
    assert a == b and len(a) == 1
    if suffix == ".nc":
        with netCDF4.Dataset(tmp_path / "a" / "o.nc") as nc:
            assert nc.history.splitlines()[-1].startswith("2023-11-14T22:13:20Z qcflag")


def test_rules_only_flag_of_many_files_byte_identical(archive, tmp_path):
    files = sorted(archive.glob("*.csv"))
    a, b = _twice(tmp_path, lambda d: ["flag", *files, "--out", d / "out"])
    assert a == b and len(a) == len(files)


def test_convert_to_netcdf_byte_identical(archive, tmp_path):
    src = sorted(archive.glob("*.csv"))[0]
    a, b = _twice(tmp_path, lambda d: ["convert", src, d / "c.nc"],
                  {"SOURCE_DATE_EPOCH": EPOCH})
    assert a == b


def test_simulate_byte_identical_both_formats(tmp_path):
    a, b = _twice(tmp_path, lambda d: ["simulate", "--out", d, "--cruises", "2", "--seed", "5",
                                       "--format", "both"], {"SOURCE_DATE_EPOCH": EPOCH})
    assert a == b and len(a) == 5  # 2 cruises x 2 formats + scenario.json


def test_audit_outputs_byte_identical(archive, model, tmp_path):
    src = sorted(archive.glob("*.csv"))[-1]
    a, b = _twice(tmp_path, lambda d: ["audit", src, "--model", model, "--out", d / "a.csv",
                                       "--queue", d / "q.csv", "--summary", d / "s.csv"])
    assert a == b and len(a) == 3


def test_train_same_seed_same_predictions(archive, model, tmp_path):
    # the model file itself holds the training time in its card, so compare what it does
    train = read_files(sorted(archive.glob("*.csv"))[:2])
    again, _ = train_model(train, estimator="logistic-at", folds=2, seed=0, fusion=False)
    again = load_model(save_model(again, tmp_path / "again.qcm"))
    first = load_model(model)
    test = read_files(sorted(archive.glob("*.csv"))[-1])
    p_again, p_first = again.predict_proba(test), first.predict_proba(test)
    assert sorted(p_again) == sorted(p_first) and p_first
    for var, proba in p_first.items():
        np.testing.assert_array_equal(p_again[var], proba, err_msg=var)


def test_checks_do_not_depend_on_the_clock(archive):
    # every statistic is a learning feature: two runs must agree exactly
    b = read_files(sorted(archive.glob("*.csv"))[0])
    first = run_checks(b)
    time.sleep(0.01)
    second = run_checks(b)
    for key, res in first.results.items():
        np.testing.assert_array_equal(second.results[key].statistic, res.statistic, str(key))


def test_source_date_epoch_must_be_a_number(archive, tmp_path):
    src = sorted(archive.glob("*.csv"))[0]
    result = CliRunner().invoke(app, ["convert", str(src), str(tmp_path / "c.nc")],
                                env={"SOURCE_DATE_EPOCH": "yesterday"})
    assert result.exit_code == 1 and "SOURCE_DATE_EPOCH" in result.stderr
    assert not (tmp_path / "c.nc").exists()
