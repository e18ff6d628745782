"""Third-party checks: the example plug-in in examples/plugin is discovered through the
``qcflag.checks`` entry-point group, validated and run from a rule set, and named in the
flag reasons. Nothing is installed into the environment: the package is made importable
from a temporary folder only for the test."""

from __future__ import annotations

import importlib.util
import json
import shutil
import subprocess
import sys
import tomllib
from pathlib import Path

import numpy as np
import pytest
import xarray as xr
from typer.testing import CliRunner

from qcflag.checks import registry
from qcflag.cli import app
from qcflag.io import write
from qcflag.pipeline import flag_batch
from qcflag.rules import load_rules, run_checks
from qcflag.simulate import SimulationConfig, simulate_archive

PLUGIN = Path(__file__).resolve().parents[1] / "examples" / "plugin"
RULES = PLUGIN / "rules" / "rated_instrument.toml"
RATING = 500.0  # dbar, as set in RULES


def _entry_points_txt() -> str:
    """entry_points.txt as an installer writes it, from the plug-in's own pyproject.toml."""
    meta = tomllib.loads((PLUGIN / "pyproject.toml").read_text())
    groups = meta["project"]["entry-points"]
    return "".join(f"[{g}]\n" + "".join(f"{k} = {v}\n" for k, v in eps.items()) + "\n"
                   for g, eps in groups.items())


@pytest.fixture
def plugin_on_path(tmp_path, monkeypatch):
    """The plug-in importable with its metadata (a *.dist-info) from a temporary folder."""
    site = tmp_path / "site"
    shutil.copytree(PLUGIN / "src" / "qcflag_example_checks", site / "qcflag_example_checks")
    info = site / "qcflag_example_checks-0.1.0.dist-info"
    info.mkdir()
    (info / "METADATA").write_text("Metadata-Version: 2.1\nName: qcflag-example-checks\n"
                                   "Version: 0.1.0\n")
    (info / "entry_points.txt").write_text(_entry_points_txt())
    monkeypatch.syspath_prepend(str(site))
    # a fresh registry for this test, so discovery really runs and nothing leaks out
    monkeypatch.setattr(registry, "CHECKS", dict(registry.CHECKS))
    monkeypatch.setattr(registry, "_loaded", False)
    yield site
    sys.modules.pop("qcflag_example_checks", None)


@pytest.fixture(scope="module")
def batch():
    cfg = SimulationConfig(casts_per_cruise=4, floats_per_cruise=1, max_cast_pressure=900)
    return simulate_archive(1, seed=33, config=cfg)


def test_not_there_without_the_plugin():
    assert "beyond_rating" not in registry.available_checks()


def test_discovered_and_run_from_a_rule_set(plugin_on_path, batch):
    checks = registry.available_checks()
    assert "beyond_rating" in checks
    assert checks["beyond_rating"].params == {"rated_pressure": "float+", "margin": "float+"}
    rules = load_rules(RULES)
    assert ("beyond_rating", "temperature") in {(s.check, s.variable) for s in rules.steps}
    table = run_checks(batch, rules)
    res = table.results[("beyond_rating", "salinity")]
    np.testing.assert_allclose(res.statistic, batch.pressure / RATING)
    deep = batch.pressure > RATING
    assert deep.any() and (~deep).any()
    assert (res.grade[deep] == 4).all()
    assert (res.grade[batch.pressure <= RATING * 0.98] == 1).all()


def test_named_in_flag_reasons(plugin_on_path, batch):
    result = flag_batch(batch, rules=RULES)
    deep = batch.pressure > RATING
    for var in ("temperature", "salinity"):
        vf = result[var]
        assert (vf.grade[deep] == 4).all()
        assert all("beyond_rating" in r.split(";") for r in vf.reasons[deep])
        assert not any("beyond_rating" in r for r in vf.reasons[batch.pressure < 400])


def test_rule_file_parameters_are_validated(plugin_on_path, tmp_path):
    bad = tmp_path / "bad.toml"
    bad.write_text(RULES.read_text().replace("rated_pressure = 500.0", 'rated_pressure = "deep"'))
    with pytest.raises(Exception, match="rated_pressure"):
        load_rules(bad)


def test_cli_uses_the_plugin(plugin_on_path, batch, tmp_path):
    src = tmp_path / "casts.nc"
    write(batch, src)
    out = tmp_path / "flagged.nc"
    res = CliRunner().invoke(app, ["flag", str(src), "-o", str(out), "--rules", str(RULES)])
    assert res.exit_code == 0, res.output
    with xr.open_dataset(out) as ds:
        reasons = ds["temperature_flag_auto_reasons"].values
        p = ds["pressure"].values
    assert all("beyond_rating" in str(r) for r in reasons[p > RATING])


def _pip_install(build: Path, target: Path) -> subprocess.CompletedProcess[str]:
    base = [sys.executable, "-m", "pip", "install", "--quiet", "--no-deps",
            "--target", str(target), str(build)]
    # offline first (the environment's own setuptools); if it cannot build a wheel
    # (setuptools < 70 without the wheel package), let pip fetch the build backend
    run = subprocess.run([*base[:-1], "--no-build-isolation", "--no-index", str(build)],
                         capture_output=True, text=True, timeout=240)
    if run.returncode != 0:
        shutil.rmtree(target, ignore_errors=True)
        run = subprocess.run(base, capture_output=True, text=True, timeout=240)
    return run


@pytest.mark.slow
@pytest.mark.skipif(importlib.util.find_spec("pip") is None, reason="pip is not installed")
def test_pip_installed_into_a_temporary_target(tmp_path, batch):
    """Install the example for real (pip, into a throwaway --target) and use it from a
    fresh interpreter through the command line."""
    build = tmp_path / "plugin"
    shutil.copytree(PLUGIN, build, ignore=shutil.ignore_patterns("build", "*.egg-info"))
    target = tmp_path / "target"
    pip = _pip_install(build, target)
    if pip.returncode != 0:
        pytest.skip(f"pip could not build the example plug-in: {pip.stderr[-300:]}")
    assert list(target.glob("qcflag_example_checks-*.dist-info/entry_points.txt"))
    src = tmp_path / "casts.nc"
    write(batch, src)
    out = tmp_path / "flagged.nc"
    code = (
        "import sys, json; from qcflag.checks.registry import available_checks; "
        "from qcflag.cli import main; "
        "print(json.dumps('beyond_rating' in available_checks())); "
        f"sys.argv = ['qcflag', 'flag', {str(src)!r}, '-o', {str(out)!r}, "
        f"'--rules', {str(RULES)!r}]; main()"
    )
    env = {"PYTHONPATH": str(target), "PATH": "/usr/bin:/bin"}
    run = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         timeout=240, env=env, cwd=tmp_path)
    assert run.returncode == 0, run.stderr[-2000:]
    assert json.loads(run.stdout.splitlines()[0]) is True
    with xr.open_dataset(out) as ds:
        reasons = ds["salinity_flag_auto_reasons"].values
        p = ds["pressure"].values
    assert all("beyond_rating" in str(r) for r in reasons[p > RATING])
