"""Nothing lost, nothing run: inputs never modified, outputs atomic, no silent overwrite,
manual flags preserved, and model files that never execute code.

A tiny invented archive (``qcflag.simulate``) and one small model trained once per session
serve the commands that need a model (``flag --model``, ``audit``).
"""

from __future__ import annotations

import io
import json
import pickle
import zipfile
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from typer.testing import CliRunner

from qcflag.cli import app
from qcflag.io import read_file, read_files, write
from qcflag.learn import FORMAT_VERSION, save_model, train_model
from qcflag.simulate import SimulationConfig, simulate_archive
from qcflag.testing import file_digests

# ~350 levels: trains in a few seconds (logistic, 2 folds, no fusion)
TINY = SimulationConfig(casts_per_cruise=2, floats_per_cruise=0, max_cast_pressure=100.0)


def _invoke(args):
    return CliRunner().invoke(app, [str(a) for a in args])


def _ok(result):
    assert result.exit_code == 0, (result.output, result.exception)
    return result


def _error_line(result) -> str:
    assert result.exit_code == 1, (result.output, result.exception)
    assert "Traceback" not in result.output
    lines = [ln for ln in result.stderr.splitlines() if ln.strip()]
    assert len(lines) == 1 and lines[0].startswith("error: "), lines
    return lines[0]


@pytest.fixture(scope="session")
def archive(tmp_path_factory):
    """Three invented cruises as CSV and NetCDF files (inputs, never to be modified)."""
    root = tmp_path_factory.mktemp("archive")
    batch = simulate_archive(3, seed=7, config=TINY)
    for cruise in batch.profiles["cruise"].unique():
        sub = batch.select(np.flatnonzero(batch.profiles["cruise"].to_numpy() == cruise))
        write(sub, root / f"{cruise}.csv", history="2025-01-01T00:00:00Z test")
        write(sub, root / f"{cruise}.nc", history="2025-01-01T00:00:00Z test")
    return root


@pytest.fixture(scope="session")
def model_file(archive, tmp_path_factory):
    train = read_files(sorted(archive.glob("*.csv"))[:2])
    model, _ = train_model(train, estimator="logistic-at", folds=2, seed=0, fusion=False)
    return save_model(model, tmp_path_factory.mktemp("model") / "tiny.qcm")


def _commands(archive: Path, model: Path, out: Path) -> dict[str, list]:
    csv = sorted(archive.glob("*.csv"))[-1]
    nc = sorted(archive.glob("*.nc"))[-1]
    return {
        "inspect": ["inspect", archive],
        "convert": ["convert", csv, out / "c.nc"],
        "flag_rules": ["flag", nc, "--out", out / "f.nc"],
        "flag_model": ["flag", csv, "--model", model, "--out", out / "m.csv"],
        "audit": ["audit", csv, "--model", model, "--out", out / "a.csv",
                  "--queue", out / "q.csv", "--summary", out / "s.csv"],
    }


# ------------------------------------------------------------------ inputs never modified
@pytest.mark.parametrize("command", ["inspect", "convert", "flag_rules", "flag_model", "audit"])
def test_inputs_never_modified(archive, model_file, tmp_path, command):
    before = file_digests([archive, model_file])
    _ok(_invoke(_commands(archive, model_file, tmp_path)[command]))
    assert file_digests([archive, model_file]) == before


# ------------------------------------------------------------------ no silent overwrite
@pytest.mark.parametrize("command", ["convert", "flag_rules", "flag_model", "audit"])
def test_existing_output_kept_without_overwrite(archive, model_file, tmp_path, command):
    args = _commands(archive, model_file, tmp_path)[command]
    _ok(_invoke(args))
    outputs = sorted(tmp_path.iterdir())
    before = file_digests(outputs)
    line = _error_line(_invoke(args))
    assert "--overwrite" in line
    assert file_digests(outputs) == before and sorted(tmp_path.iterdir()) == outputs
    _ok(_invoke([*args, "--overwrite"]))


def test_simulate_refuses_to_overwrite(tmp_path):
    args = ["simulate", "--out", tmp_path, "--cruises", "1", "--seed", "3"]
    _ok(_invoke(args))
    before = file_digests([tmp_path])
    assert "--overwrite" in _error_line(_invoke(args))
    assert file_digests([tmp_path]) == before


# ------------------------------------------------------------------ atomic outputs
class _Boom(Exception):
    pass


@pytest.mark.parametrize("interrupt", [KeyboardInterrupt, _Boom], ids=["ctrl-c", "crash"])
@pytest.mark.parametrize("suffix", [".csv", ".nc"])
def test_interrupted_write_leaves_nothing(archive, tmp_path, monkeypatch, interrupt, suffix):
    """The writer dies after writing part of the file: no output, no temporary file."""
    import xarray as xr

    def half_then_die_csv(self, path, *a, **k):
        Path(path).write_text("profile_id,cruise\nA,")  # a partial file on disk
        raise interrupt()

    def half_then_die_nc(self, path, *a, **k):
        Path(path).write_bytes(b"\x89HDF\r\n\x1a\n partial")
        raise interrupt()

    def half_then_die_direct(path, *a, **k):  # the writer that bypasses xarray
        half_then_die_nc(None, path)

    def half_then_die_table(table, path, *a, **k):  # the CSV writer that bypasses pandas
        half_then_die_csv(None, path)

    from qcflag.io import csv as qcsv
    from qcflag.io import netcdf

    monkeypatch.setattr(pd.DataFrame, "to_csv", half_then_die_csv)
    monkeypatch.setattr(qcsv, "write_table", half_then_die_table)
    monkeypatch.setattr(xr.Dataset, "to_netcdf", half_then_die_nc)
    monkeypatch.setattr(netcdf, "_write_direct", half_then_die_direct)
    src = sorted(archive.glob("*.csv"))[0]
    out = tmp_path / "out"
    out.mkdir()
    result = _invoke(["flag", src, "--out", out / f"flagged{suffix}"])
    if interrupt is KeyboardInterrupt:
        assert result.exit_code == 130 and "interrupted" in result.stderr
    else:
        assert result.exit_code != 0 and isinstance(result.exception, _Boom)
    assert list(out.iterdir()) == []


def test_interrupt_between_files_keeps_finished_files_whole(archive, tmp_path, monkeypatch):
    import qcflag.pipeline as pipeline

    real = pipeline.flag_batch
    calls = []

    def second_dies(*a, **k):
        calls.append(1)
        if len(calls) == 2:
            raise KeyboardInterrupt
        return real(*a, **k)

    monkeypatch.setattr(pipeline, "flag_batch", second_dies)
    files = sorted(archive.glob("*.csv"))
    result = _invoke(["flag", *files, "--out", tmp_path / "out"])
    assert result.exit_code == 130
    written = sorted((tmp_path / "out").iterdir())
    assert [p.name for p in written] == [files[0].name]  # no partial second file, no temp
    assert len(pd.read_csv(written[0])) == read_file(files[0]).n_levels


# ------------------------------------------------------------------ manual flags preserved
@pytest.mark.parametrize("suffix", [".csv", ".nc"])
def test_manual_flags_preserved(archive, model_file, tmp_path, suffix):
    for src in (sorted(archive.glob("*.csv"))[-1], sorted(archive.glob("*.nc"))[-1]):
        out = tmp_path / f"{src.stem}_{src.suffix[1:]}{suffix}"
        _ok(_invoke(["flag", src, "--model", model_file, "--out", out]))
        before, after = read_file(src), read_file(out)
        assert sorted(after.flags) == sorted(before.flags) == ["pressure", "salinity",
                                                               "temperature"]
        for v, codes in before.flags.items():
            np.testing.assert_array_equal(after.flags[v], codes, err_msg=v)
        for v in ("pressure", "temperature", "salinity"):
            np.testing.assert_array_equal(after.values(v), before.values(v))


def test_manual_flag_columns_byte_identical_in_csv(archive, tmp_path):
    src = sorted(archive.glob("*.csv"))[0]
    _ok(_invoke(["flag", src, "--out", tmp_path / "o.csv"]))
    a = pd.read_csv(src, dtype=str, keep_default_na=False)
    b = pd.read_csv(tmp_path / "o.csv", dtype=str, keep_default_na=False)
    for col in a.columns:  # every input column comes back unchanged, flags included
        assert b[col].tolist() == a[col].tolist(), col


# ------------------------------------------------------------------ nothing run
def _rezip(src: Path, dst: Path, edit) -> Path:
    with zipfile.ZipFile(src) as zf:
        members = {n: zf.read(n) for n in zf.namelist()}
    edit(members)
    with zipfile.ZipFile(dst, "w") as zf:
        for n, data in members.items():
            zf.writestr(n, data)
    return dst


class _Payload:
    """Unpickling this object would create the marker file."""

    def __init__(self, marker: Path) -> None:
        self.marker = str(marker)

    def __reduce__(self):
        return (Path.touch, (Path(self.marker),))


def _malicious_files(model_file: Path, tmp: Path, marker: Path) -> dict[str, Path]:
    evil = pickle.dumps(_Payload(marker))
    buf = io.BytesIO()
    np.save(buf, np.array([_Payload(marker)], dtype=object), allow_pickle=True)
    npy_obj = buf.getvalue()
    files = {}
    files["plain_pickle"] = tmp / "pickle.qcm"
    files["plain_pickle"].write_bytes(evil)

    def add_member(m):
        m["payload.pkl"] = evil

    def object_array(m):
        name = next(n for n in m if n.startswith("arrays/"))
        m[name] = npy_obj

    files["zip_with_pickle_member"] = _rezip(model_file, tmp / "member.qcm", add_member)
    files["npy_object_array"] = _rezip(model_file, tmp / "objarr.qcm", object_array)
    return files


def test_malicious_model_refused_and_never_executed(model_file, archive, tmp_path):
    marker = tmp_path / "PWNED"
    pickle.loads(pickle.dumps(_Payload(marker)))  # the payload works when unpickled ...
    assert marker.exists()
    marker.unlink()
    src = sorted(archive.glob("*.csv"))[0]
    for name, bad in _malicious_files(model_file, tmp_path, marker).items():
        for args in (["flag", src, "--model", bad, "--out", tmp_path / "o.csv"],
                     ["audit", src, "--model", bad, "--out", tmp_path / "a.csv"]):
            line = _error_line(_invoke(args))
            assert bad.name in line, (name, line)
            assert not marker.exists(), name  # ... but loading a model never unpickles
            assert not (tmp_path / "o.csv").exists() and not (tmp_path / "a.csv").exists()


def test_newer_model_format_refused_with_upgrade_message(model_file, archive, tmp_path):
    def bump(m):
        meta = json.loads(m["model.json"])
        meta["format_version"] = FORMAT_VERSION + 1
        m["model.json"] = json.dumps(meta).encode()

    newer = _rezip(model_file, tmp_path / "newer.qcm", bump)
    src = sorted(archive.glob("*.csv"))[0]
    line = _error_line(_invoke(["flag", src, "--model", newer, "--out", tmp_path / "o.csv"]))
    assert "newer.qcm" in line and "upgrade qcflag" in line and str(FORMAT_VERSION + 1) in line
    assert not (tmp_path / "o.csv").exists()


def test_tampered_model_refused(model_file, archive, tmp_path):
    def tamper(m):
        meta = json.loads(m["model.json"])
        meta["scheme"] = "woce_ctd" if meta.get("scheme") != "woce_ctd" else "argo"
        m["model.json"] = json.dumps(meta).encode()

    bad = _rezip(model_file, tmp_path / "edited.qcm", tamper)
    src = sorted(archive.glob("*.csv"))[0]
    line = _error_line(_invoke(["flag", src, "--model", bad, "--out", tmp_path / "o.csv"]))
    assert "edited.qcm" in line and "integrity" in line
