"""Files that share a cruise are flagged together with ``join_cruises`` (``--join-cruises``).

The archive is invented (qcflag.simulate): one cruise is written one profile per file, as
float data often are, and one of its float fixes is moved about 3,000 km away from the fixes
ten days before and after it. Only a run that sees the whole track can catch it (Argo test
5, impossible speed; tests/test_checks_track.py checks the check itself against
gsw.distance).
"""

from __future__ import annotations

import filecmp

import numpy as np
import pytest
from typer.testing import CliRunner

from qcflag import ProfileBatch
from qcflag.cli import app
from qcflag.io import AddedColumn, read_file, write
from qcflag.pipeline import flag_batch, flagged_columns
from qcflag.scale import cruise_groups, flag_files_parallel
from qcflag.simulate import SimulationConfig, simulate_archive

HISTORY = "2024-05-06T07:08:09Z qcflag test: fixed history line"


@pytest.fixture(scope="module")
def split_cruise(tmp_path_factory):
    """Cruise 1 written one profile per file (with an impossible fix), cruise 2 whole."""
    d = tmp_path_factory.mktemp("split")
    cfg = SimulationConfig(casts_per_cruise=3, floats_per_cruise=1, cycles_per_float=4,
                           max_cast_pressure=400)
    b = simulate_archive(2, seed=3, config=cfg)
    prof = b.profiles
    floats = np.flatnonzero((prof["instrument"] == "float").to_numpy()
                            & (prof["cruise"] == prof["cruise"].iloc[0]).to_numpy())
    moved = int(floats[2])  # third float fix: ~3,000 km away from its neighbours, 10 days
    lon = prof["longitude"].to_numpy(dtype=np.float64).copy()  # apart (deep water still)
    lon[moved] = -50.0
    b.profiles["longitude"] = lon
    cruises = prof["cruise"].astype(str).to_numpy()
    first = np.flatnonzero(cruises == cruises[0])
    files = []
    for i in first:
        p = d / f"profile_{i:02d}.nc"
        write(b.select([int(i)]), p)
        files.append(p)
    rest = d / "cruise_2.nc"
    write(b.select(cruises != cruises[0]), rest)
    files.append(rest)
    return files, moved


def _reasons(batch: ProfileBatch) -> np.ndarray:
    return np.asarray(flag_batch(batch)["temperature"].reasons, dtype=str)


def test_whole_track_is_needed_to_catch_the_fix(split_cruise):
    files, moved = split_cruise
    whole = ProfileBatch.concat([read_file(f) for f in files[:-1]])
    joined = np.char.find(_reasons(whole), "impossible_speed") >= 0
    assert joined.any()  # the joined cruise catches the impossible fix ...
    assert set(np.unique(whole.profile_index[joined])) == {moved}
    for f in files[:-1]:  # ... no single-profile file can
        assert not (np.char.find(_reasons(read_file(f)), "impossible_speed") >= 0).any()


def test_join_cruises_writes_what_flagging_the_whole_cruise_gives(split_cruise, tmp_path):
    files, _ = split_cruise
    flag_files_parallel(files, tmp_path / "joined", join_cruises=True, progress=False,
                        history=HISTORY)
    flag_files_parallel(files, tmp_path / "apart", progress=False, history=HISTORY)
    # expected: the cruise flagged as one batch, each file written with its own slice
    batches = [read_file(f) for f in files[:-1]]
    whole = ProfileBatch.concat(batches)
    added = flagged_columns(whole, flag_batch(whole))
    stop = 0
    for f, b in zip(files[:-1], batches, strict=True):
        start, stop = stop, stop + b.n_levels
        own = {k: AddedColumn(np.asarray(c.values)[start:stop], dict(c.attrs), c.parent)
               for k, c in added.items()}
        write(b, tmp_path / "expected" / f.name, added=own, history=HISTORY)
    names = [f.name for f in files[:-1]]
    assert all(filecmp.cmp(tmp_path / "joined" / n, tmp_path / "expected" / n, shallow=False)
               for n in names)
    # the file of a cruise of its own is flagged the same either way
    assert filecmp.cmp(tmp_path / "joined" / files[-1].name,
                       tmp_path / "apart" / files[-1].name, shallow=False)
    # and flagging file by file misses the fix
    assert not all(filecmp.cmp(tmp_path / "joined" / n, tmp_path / "apart" / n,
                               shallow=False) for n in names)


def test_join_cruises_two_workers_identical_and_summary(split_cruise, tmp_path):
    files, _ = split_cruise
    one = flag_files_parallel(files, tmp_path / "w1", join_cruises=True, progress=False,
                              history=HISTORY)
    two = flag_files_parallel(files, tmp_path / "w2", workers=2, join_cruises=True,
                              progress=False, history=HISTORY)
    for f in files:
        assert filecmp.cmp(tmp_path / "w1" / f.name, tmp_path / "w2" / f.name, shallow=False)
    assert [s.input for s in one.files] == [str(f) for f in files]  # input order kept
    assert [s.n_levels for s in one.files] == [read_file(f).n_levels for f in files]
    assert one.grade_counts() == two.grade_counts()
    assert sum(one.grade_counts()["temperature"].values()) == one.n_levels


def test_cruise_groups_are_transitive(tmp_path):
    cfg = SimulationConfig(casts_per_cruise=2, floats_per_cruise=0, max_cast_pressure=300)
    b = simulate_archive(3, seed=5, config=cfg)
    cruise = b.profiles["cruise"].astype(str).to_numpy()
    a, c, e = np.unique(cruise)
    pos = {k: np.flatnonzero(cruise == k) for k in (a, c, e)}
    layout = {  # file -> profiles: f0 and f2 share cruise a, f2 and f3 share c; f1 alone
        "f0.nc": pos[a][:1], "f1.nc": pos[e], "f2.nc": np.r_[pos[a][1:], pos[c][:1]],
        "f3.nc": pos[c][1:],
    }
    paths = []
    for name, idx in layout.items():
        write(b.select(idx), tmp_path / name)
        paths.append(tmp_path / name)
    assert cruise_groups(paths) == [[0, 2, 3], [1]]


def test_cli_join_cruises(split_cruise, tmp_path):
    files, _ = split_cruise
    res = CliRunner().invoke(app, ["flag", *map(str, files), "--out", str(tmp_path / "o"),
                                   "--join-cruises"])
    assert res.exit_code == 0, res.output
    assert sorted(p.name for p in (tmp_path / "o").iterdir()) == sorted(f.name for f in files)


def test_cruise_groups_ignore_empty_cruise_names(tmp_path):
    cfg = SimulationConfig(casts_per_cruise=2, floats_per_cruise=0, max_cast_pressure=300)
    b = simulate_archive(1, seed=6, config=cfg)
    b.profiles["cruise"] = ""
    paths = [tmp_path / "a.nc", tmp_path / "b.nc"]
    write(b.select([0]), paths[0])
    write(b.select([1]), paths[1])
    names = {str(read_file(p).profiles["cruise"].iloc[0]) for p in paths}
    groups = cruise_groups(paths)
    # the reader names the cruise after the file when the file has none; either way two
    # files without a shared, non-empty cruise name are not joined
    assert groups == [[0], [1]], names
