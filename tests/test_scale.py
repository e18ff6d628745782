"""Archive scale: parallel flagging writes exactly what the single-process run writes.

The archive is invented (qcflag.simulate); what is checked is that splitting the work
over processes and chunks changes nothing, and that bad requests fail before any work.
"""

from __future__ import annotations

import filecmp
import json

import numpy as np
import pytest
import xarray as xr
from typer.testing import CliRunner

from qcflag.cli import app
from qcflag.exceptions import OutputExistsError, QCFlagError
from qcflag.io import read_file, write
from qcflag.scale import flag_batch_chunked, flag_files_parallel
from qcflag.simulate import SimulationConfig, simulate_archive

HISTORY = "2024-05-06T07:08:09Z qcflag test: fixed history line"


@pytest.fixture(scope="module")
def archive(tmp_path_factory):
    """Three cruise files (NetCDF) and one CSV of invented profiles."""
    d = tmp_path_factory.mktemp("archive")
    cfg = SimulationConfig(casts_per_cruise=4, floats_per_cruise=1, max_cast_pressure=600)
    b = simulate_archive(3, seed=11, config=cfg)
    paths = []
    cruises = b.profiles["cruise"].to_numpy()
    for i, c in enumerate(np.unique(cruises)):
        p = d / (f"{c}.nc" if i < 2 else f"{c}.csv")
        write(b.select(cruises == c), p)
        paths.append(p)
    return paths


def _same_files(a, b, names):
    return [n for n in names if not filecmp.cmp(a / n, b / n, shallow=False)]


def test_chunked_flagging_equals_whole_batch(archive):
    from qcflag import ProfileBatch

    batch = ProfileBatch.concat([read_file(archive[0]), read_file(archive[1])])  # 2 cruises
    whole, counts = flag_batch_chunked(batch, chunk_levels=10**9)
    parts, counts_parts = flag_batch_chunked(batch, chunk_levels=300)
    assert len(list(batch.iter_chunks(300))) == 2  # really split (between the cruises)
    assert list(whole) == list(parts)
    for name in whole:
        np.testing.assert_array_equal(np.asarray(whole[name].values),
                                      np.asarray(parts[name].values), err_msg=name)
    assert counts == counts_parts
    assert sum(counts["temperature"].values()) == batch.n_levels


def test_serial_run_equals_flag_files(archive, tmp_path, monkeypatch):
    from qcflag import pipeline

    monkeypatch.setattr(pipeline, "_history_line", lambda command: HISTORY)
    pipeline.flag_files(archive, tmp_path / "ref")
    summary = flag_files_parallel(archive, tmp_path / "one", workers=1, history=HISTORY,
                                  chunk_levels=500, progress=False)
    names = [p.name for p in archive]
    assert _same_files(tmp_path / "ref", tmp_path / "one", names) == []
    assert summary.n_files == 3
    assert summary.n_levels == sum(read_file(p).n_levels for p in archive)
    data = json.loads(summary.to_json())
    assert data["outputs"] == [str(tmp_path / "one" / n) for n in names]


def test_two_workers_byte_identical_to_one(archive, tmp_path):
    one = flag_files_parallel(archive, tmp_path / "w1", workers=1, history=HISTORY,
                              progress=False)
    two = flag_files_parallel(archive, tmp_path / "w2", workers=2, history=HISTORY,
                              chunk_levels=700, progress=True)
    assert two.workers == 2 and two.scheduler is not None
    names = [p.name for p in archive]
    assert _same_files(tmp_path / "w1", tmp_path / "w2", names) == []
    assert one.grade_counts() == two.grade_counts()
    # and the flags really are there
    with xr.open_dataset(tmp_path / "w2" / names[0]) as ds:
        assert "temperature_flag_auto" in ds
        assert "temperature_flag_auto" in ds["temperature"].attrs["ancillary_variables"]


def test_existing_output_refused_before_any_work(archive, tmp_path):
    out = tmp_path / "out"
    out.mkdir()
    (out / archive[1].name).write_bytes(b"keep me")
    with pytest.raises(OutputExistsError, match="--overwrite"):
        flag_files_parallel(archive, out, workers=1, progress=False)
    assert not (out / archive[0].name).exists()  # nothing was written
    assert (out / archive[1].name).read_bytes() == b"keep me"
    flag_files_parallel(archive, out, workers=1, overwrite=True, progress=False)
    assert (out / archive[1].name).read_bytes() != b"keep me"


def test_bad_requests(archive, tmp_path):
    with pytest.raises(QCFlagError, match="workers"):
        flag_files_parallel(archive, tmp_path / "o", workers=0)
    with pytest.raises(QCFlagError, match="no such input file"):
        flag_files_parallel([tmp_path / "missing.nc"], tmp_path / "o")
    with pytest.raises(QCFlagError, match="replace an input"):
        flag_files_parallel([archive[0]], archive[0], overwrite=True, progress=False)


def test_cli_workers_and_bad_scheduler(archive, tmp_path, monkeypatch):
    from qcflag import scale

    monkeypatch.setattr(scale, "CONNECT_TIMEOUT", "2s")
    runner = CliRunner()
    res = runner.invoke(app, ["flag", *map(str, archive[:2]), "-o", str(tmp_path / "cli"),
                              "--workers", "1"])
    assert res.exit_code == 0, res.output
    assert json.loads(res.stdout)["workers"] == 1
    assert (tmp_path / "cli" / archive[0].name).is_file()
    res = runner.invoke(app, ["flag", str(archive[0]), "-o", str(tmp_path / "x.nc"),
                              "--scheduler", "tcp://127.0.0.1:9"])
    assert res.exit_code == 1
    assert "--scheduler tcp://127.0.0.1:9" in res.stderr
    assert not (tmp_path / "x.nc").exists()
    res = runner.invoke(app, ["flag", str(archive[0]), "-o", str(tmp_path / "y.nc"),
                              "--workers", "0"])
    assert res.exit_code == 2


def test_rule_set_parsed_once_per_process(tmp_path):
    """Tasks reuse the parsed rule set; an edited rule file is parsed again."""
    from qcflag import scale
    from qcflag.rules import load_rules

    std = scale._resolve_rules(None)
    assert scale._resolve_rules(None) is std and scale._resolve_rules("standard") is std
    assert std.checks == load_rules(None).checks
    src = load_rules("coastal")
    f = tmp_path / "mine.toml"
    f.write_text(src.text)
    first = scale._resolve_rules(str(f))
    assert scale._resolve_rules(f) is first and first.checks == src.checks
    f.write_text(src.text + "\n# edited\n")  # new size: parsed again
    assert scale._resolve_rules(f) is not first
    assert scale._resolve_rules(first) is first  # a RuleSet passes through
    with pytest.raises(QCFlagError):
        scale._resolve_rules(tmp_path / "missing.toml")


def test_local_cluster_workers_keep_default_malloc_trimming():
    """Workers started for flagging do not inherit dask's 64 KiB malloc trim threshold."""
    import os

    from distributed import Client

    from qcflag.scale import local_cluster

    with local_cluster(1) as cluster, Client(cluster) as client:
        env = client.run(lambda: os.environ.get("MALLOC_TRIM_THRESHOLD_"))
        # and the dashboard-only stack sampler is off (the cluster serves no dashboard)
        sampling = client.run(lambda dask_worker: "profile" in dask_worker.periodic_callbacks)
        # one single-threaded worker per core: model prediction stays on one thread there
        threads = client.run(_prediction_threads)
    assert list(env.values()) == [None]
    assert list(sampling.values()) == [False]
    assert list(threads.values()) == [1]


def _prediction_threads() -> int:
    from qcflag.learn.trees import effective_threads

    return effective_threads(None)


def test_packing_puts_every_file_in_one_task_largest_first():
    from qcflag.scale import _pack_units

    rng = np.random.default_rng(3)
    for n_units, n_workers in ((1, 1), (7, 2), (30, 2), (200, 3), (50, 8)):
        sizes = rng.integers(0, 9_000_000, size=n_units).tolist()
        units = [[i] for i in range(n_units)]
        tasks = _pack_units(units, sizes, n_workers, task_bytes=16_000_000)
        flat = [u for t in tasks for u in t]
        assert sorted(flat) == list(range(n_units))  # each unit once
        assert [sizes[u] for u in flat] == sorted(sizes, reverse=True)  # largest first
        for t in tasks:  # a task stops at the first unit that reaches its target
            assert sum(sizes[u] for u in t[:-1]) < 16_000_000
        assert len(tasks[-1]) == 1  # the run ends on single units
    # thirty equal small files on two workers: packed, yet enough tasks to balance
    tasks = _pack_units([[i] for i in range(30)], [2_000_000] * 30, 2, task_bytes=16_000_000)
    assert 2 * 2 <= len(tasks) < 30
    assert [len(t) for t in tasks[-2 * 2:]] == [1] * 4
    # a group of files joined by cruise is one unit and never split
    tasks = _pack_units([[0, 2], [1]], [5, 7, 5], 1, task_bytes=1)
    assert tasks == [[0], [1]]


def test_packed_tasks_write_what_one_process_writes(archive, tmp_path, monkeypatch):
    """All files in a single dask task (each still flagged on its own) change nothing."""
    from qcflag import scale

    monkeypatch.setattr(scale, "_pack_units",
                        lambda units, sizes, n_workers: [list(range(len(units)))[::-1]])
    one = flag_files_parallel(archive, tmp_path / "w1", workers=1, history=HISTORY,
                              progress=False)
    two = flag_files_parallel(archive, tmp_path / "w2", workers=2, history=HISTORY,
                              progress=False)
    names = [p.name for p in archive]
    assert _same_files(tmp_path / "w1", tmp_path / "w2", names) == []
    assert [f.input for f in two.files] == [f.input for f in one.files]
    assert [f.n_levels for f in two.files] == [f.n_levels for f in one.files]
