"""The end-to-end demo on a small invented scenario, through the library and the CLI."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
from typer.testing import CliRunner

from qcflag.cli import app
from qcflag.demo import run_demo
from qcflag.exceptions import OutputExistsError, QCFlagError
from qcflag.io import read_files
from qcflag.report import CAUTION

# mord (third party) still passes options that scipy deprecates; not ours to fix
pytestmark = pytest.mark.filterwarnings("ignore:scipy.optimize:DeprecationWarning")


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    out = tmp_path_factory.mktemp("demo") / "qcflag-demo"
    messages: list[str] = []
    summary = run_demo(out, n_cruises=3, seed=0, small=True, progress=messages.append)
    return out, summary, messages


def test_demo_writes_every_stage(demo):
    out, s, messages = demo
    assert s.index_html == out / "reports" / "index.html" and s.index_html.is_file()
    assert s.model_path.is_file() and s.audit_path.is_file() and s.evaluation_path.is_file()
    assert len(s.train_cruises) == 2 and len(s.holdout_cruises) == 1
    assert not set(s.train_cruises) & set(s.holdout_cruises)
    assert sorted(p.name for p in (out / "flagged").iterdir()) == [
        f"{c}.csv" for c in s.holdout_cruises]
    assert {p.name for p in s.reports_dir.iterdir()} >= {
        "index.html", "index.json", *(f"{c}.html" for c in s.holdout_cruises)}
    assert messages[0].startswith("[1/6]") and "index.html" in messages[-1]
    assert not [p for p in out.parent.iterdir() if p.name.startswith(".")]  # no temp dirs
    recorded = json.loads((out / "demo.json").read_text())
    assert recorded["holdout_cruises"] == s.holdout_cruises
    assert recorded["seconds"]["total"] > 0


def test_flagged_files_carry_the_automatic_flags_of_the_report(demo):
    out, s, _ = demo
    c = s.holdout_cruises[0]
    flagged = pd.read_csv(out / "flagged" / f"{c}.csv")
    for var in ("temperature", "salinity"):
        assert f"{var}_flag_auto" in flagged.columns
    # the report's flag counts are the counts of the flags written to the file
    summary = json.loads((s.reports_dir / f"{c}.json").read_text())
    auto = pd.to_numeric(flagged["temperature_flag_auto"], errors="coerce")
    for g in ("1", "3", "4"):  # Argo codes 1, 3, 4 are grades 1, 3, 4
        assert summary["flag_counts"]["temperature"][g]["auto"] == int((auto == int(g)).sum())
    # the report covers exactly the held-out data as read back from the scenario files
    hold = read_files(out / "data" / f"{c}.csv")
    assert summary["numbers"]["n_levels"] == hold.n_levels
    assert summary["numbers"]["n_profiles"] == hold.n_profiles
    assert summary["caution"] == CAUTION


def test_audit_and_evaluation_are_consistent(demo):
    _, s, _ = demo
    audit = pd.read_csv(s.audit_path)
    c = s.holdout_cruises[0]
    summary = json.loads((s.reports_dir / f"{c}.json").read_text())
    assert set(audit["cruise"].astype(str)) <= {c}
    assert summary["numbers"]["n_disagreements"] == len(summary["disagreements"])
    ev = json.loads(s.evaluation_path.read_text())
    assert ev["holdout_cruises"] == s.holdout_cruises
    for var in ("temperature", "salinity"):
        block = ev["holdout"][var]
        for key in ("against_manual", "automatic_vs_truth", "manual_vs_truth"):
            cm = np.array(block[key]["confusion"])
            assert cm.shape == (4, 4) and cm.sum() == block[key]["n"]
    # automatic vs manual confusion in the evaluation equals the report's confusion table
    # restricted to levels graded on both sides
    rep = np.array(summary["confusion"]["temperature"]["counts"])[:4, :4]
    assert (rep == np.array(ev["holdout"]["temperature"]["against_manual"]["confusion"])).all()


def test_demo_refuses_existing_folder_and_too_few_cruises(demo, tmp_path):
    out, _, _ = demo
    with pytest.raises(OutputExistsError, match="--overwrite"):
        run_demo(out, n_cruises=3, small=True, progress=False)
    with pytest.raises(QCFlagError, match="at least 3"):
        run_demo(tmp_path / "d", n_cruises=2, small=True, progress=False)
    assert not (tmp_path / "d").exists()


def test_cli_demo_existing_folder_is_one_line_error(demo):
    out, _, _ = demo
    r = CliRunner().invoke(app, ["demo", "--out", str(out)])
    assert r.exit_code == 1
    assert "--overwrite" in r.output and "Traceback" not in r.output


def test_cli_report_on_demo_outputs(demo, tmp_path):
    out, s, _ = demo
    c = s.holdout_cruises[0]
    dest = tmp_path / "rep"
    r = CliRunner().invoke(app, ["report", str(out / "data" / f"{c}.csv"), "--model",
                                 str(s.model_path), "--out", str(dest)])
    assert r.exit_code == 0, r.output
    assert "index.html" in r.output
    again = json.loads((dest / f"{c}.json").read_text())
    first = json.loads((s.reports_dir / f"{c}.json").read_text())
    # same data, same model -> same flags and numbers as the demo's own report
    assert again["flag_counts"] == first["flag_counts"]
    assert again["numbers"] == first["numbers"]
    r = CliRunner().invoke(app, ["report", str(out / "data" / f"{c}.csv"), "--out", str(dest)])
    assert r.exit_code == 1 and "--overwrite" in r.output
    r = CliRunner().invoke(app, ["report", str(tmp_path / "missing.csv"), "--out",
                                 str(tmp_path / "x")])
    assert r.exit_code == 1 and "Traceback" not in r.output
