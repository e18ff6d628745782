"""flag_dataset / check_dataset: flags land on the right cells of every CF layout, the
input is never touched, and dask-backed datasets stay lazy and are flagged by blocks.

Layouts follow CF-1.13 chapter 9 (../shared/reference/formats-and-conventions.md section 2):
contiguous ragged (row_size with sample_dimension), indexed ragged (prof_idx with
instance_dimension) and incomplete multidimensional (profile x level, padded with fill).
The profiles are invented (qcflag.simulate).
"""

from __future__ import annotations

import dask
import dask.array
import numpy as np
import pytest
import xarray as xr
from dask.callbacks import Callback

import qcflag
from qcflag.chain import POSITION_VARIABLE, check_dataset, flag_dataset
from qcflag.io import from_dataset, to_dataset
from qcflag.pipeline import flag_batch
from qcflag.rules import run_checks
from qcflag.schemes import NO_FLAG
from qcflag.simulate import SimulationConfig, simulate_archive

HISTORY = "2024-05-06T07:08:09Z qcflag test: fixed history line"
FLAGS = ("temperature_flag_auto", "salinity_flag_auto")


@pytest.fixture(scope="module")
def batch():
    cfg = SimulationConfig(casts_per_cruise=5, floats_per_cruise=2, max_cast_pressure=700)
    return simulate_archive(3, seed=5, config=cfg)  # three cruises: blocks keep each whole


@pytest.fixture(scope="module")
def contiguous(batch):
    return to_dataset(batch, history=HISTORY)


@pytest.fixture(scope="module")
def reference(batch):
    """Flags of the batch straight from the pipeline (stored codes, NO_FLAG as -128)."""
    res = flag_batch(batch)
    return {f"{v}_flag_auto": np.where(res[v].codes("argo") == NO_FLAG, -128,
                                       res[v].codes("argo")).astype(np.int8)
            for v in ("temperature", "salinity")}


def _core(ds):
    keep = ["profile_id", "time", "latitude", "longitude", "pressure", "temperature",
            "salinity"]
    return ds[keep]


def _indexed(contiguous, batch):
    """The same profiles as an indexed ragged array, levels interleaved across profiles."""
    ds = _core(contiguous)
    order = np.lexsort((batch.profile_index, batch.level_index))  # level-major interleave
    out = ds.isel(obs=order)
    out["prof_idx"] = ("obs", batch.profile_index[order].astype(np.int32),
                       {"instance_dimension": "profile"})
    out.attrs = {"featureType": "profile"}
    return out, order


def _multidim(contiguous, batch):
    """Incomplete multidimensional: (profile, level) padded with NaN."""
    n_lev = int(batch.counts.max())
    cell = batch.profile_index * n_lev + batch.level_index
    ds = _core(contiguous).drop_vars(["pressure", "temperature", "salinity"])
    for v in ("pressure", "temperature", "salinity"):
        grid = np.full(batch.n_profiles * n_lev, np.nan)
        grid[cell] = batch.values(v)
        ds[v] = (("profile", "level"), grid.reshape(batch.n_profiles, n_lev),
                 dict(contiguous[v].attrs))
    ds.attrs = {"featureType": "profile"}
    return ds, cell


def test_contiguous_flags_added_and_input_untouched(contiguous, reference):
    before = contiguous.copy(deep=True)
    out = flag_dataset(contiguous, history=HISTORY)
    xr.testing.assert_identical(contiguous, before)
    for name in FLAGS:
        assert out[name].dims == ("obs",)
        np.testing.assert_array_equal(out[name].values, reference[name])
    assert "temperature_flag_auto" in out["temperature"].attrs["ancillary_variables"]
    assert "temperature_flag_auto" not in contiguous["temperature"].attrs.get(
        "ancillary_variables", "")
    assert POSITION_VARIABLE not in out.variables
    assert out.attrs["history"].endswith(HISTORY)
    # every original variable is still there, unchanged
    for v in contiguous.data_vars:
        np.testing.assert_array_equal(out[v].values, contiguous[v].values)


def test_indexed_ragged_flags_follow_their_levels(contiguous, batch, reference):
    ds, order = _indexed(contiguous, batch)
    before = ds.copy(deep=True)
    out = flag_dataset(ds)
    xr.testing.assert_identical(ds, before)
    for name in FLAGS:
        np.testing.assert_array_equal(out[name].values, reference[name][order])


def test_multidimensional_flags_on_cells_and_fill_in_padding(contiguous, batch, reference):
    ds, cell = _multidim(contiguous, batch)
    out = flag_dataset(ds)
    for name in FLAGS:
        grid = out[name].values
        assert out[name].dims == ("profile", "level")
        np.testing.assert_array_equal(grid.ravel()[cell], reference[name])
        pad = np.ones(grid.size, bool)
        pad[cell] = False
        assert pad.any() and (grid.ravel()[pad] == -128).all()
        assert np.isnan(out[name.replace("flag_auto", "flag_auto_confidence")]
                        .values.ravel()[pad]).all()


def test_check_dataset_matches_run_checks(contiguous):
    out = check_dataset(contiguous, history=HISTORY)
    table = run_checks(from_dataset(contiguous))
    assert table.results
    for (check, var), res in table.results.items():
        # rtol: the date check's statistic counts days until "now", which moves on
        np.testing.assert_allclose(out[f"{var}_{check}"].values, res.statistic, rtol=1e-6)
        np.testing.assert_array_equal(out[f"{var}_{check}_grade"].values, res.grade)
    assert "temperature_spike" in out


class _Counter(Callback):
    """Counts every dask computation started and records the key of every task run."""

    def __init__(self):
        super().__init__()
        self.computes = 0
        self.keys = []

    def _start(self, dsk):
        self.computes += 1

    def _pretask(self, key, dsk, state):
        self.keys.append(key)


def test_dask_contiguous_is_lazy_and_blockwise(contiguous, monkeypatch):
    import qcflag.chain as chain

    lazy_in = contiguous.chunk({"obs": 2000})
    seen_sizes = []
    real = chain._read_block

    def spy(ds, *args, **kwargs):
        seen_sizes.append(int(ds.sizes["obs"]))
        return real(ds, *args, **kwargs)

    monkeypatch.setattr(chain, "_read_block", spy)
    sched = _Counter()
    with dask.config.set(scheduler="sync"), sched:
        out = flag_dataset(lazy_in, history=HISTORY)
        assert isinstance(out["temperature_flag_auto"].data, dask.array.Array)
        # before .compute(): one small computation of the per-profile count (row_size)
        # and cruise (one chunk each) to find profile and cruise boundaries; no level
        # block was read or flagged
        assert sched.computes <= 1 and len(sched.keys) <= 4
        assert seen_sizes == []
        before = len(sched.keys)
        done = out.compute()
    assert sched.computes >= 2 and len(sched.keys) - before > len(seen_sizes)
    n_obs = contiguous.sizes["obs"]
    assert len(seen_sizes) >= 3 and max(seen_sizes) < n_obs  # block by block
    assert sum(seen_sizes) == n_obs
    eager = flag_dataset(contiguous, history=HISTORY)
    xr.testing.assert_identical(done, eager)


def test_dask_multidimensional_matches_eager(contiguous, batch):
    ds, _ = _multidim(contiguous, batch)
    lazy_in = ds.chunk({"profile": 3})
    sched = _Counter()
    with dask.config.set(scheduler="sync"), sched:
        out = flag_dataset(lazy_in, history=HISTORY)
        assert sched.computes == 0 and sched.keys == []  # nothing at all computed yet
    assert out["salinity_flag_auto"].chunks[0] == lazy_in["salinity"].chunks[0]
    xr.testing.assert_identical(out.compute(), flag_dataset(ds, history=HISTORY))


def test_dask_check_dataset_matches_eager(contiguous):
    lazy = check_dataset(contiguous.chunk({"obs": 3000}), history=HISTORY)
    assert isinstance(lazy["temperature_spike"].data, dask.array.Array)
    done, eager = lazy.compute(), check_dataset(contiguous, history=HISTORY)
    # the date check's statistic counts days until "now", which moves on between runs
    moving = [v for v in eager.data_vars if str(v).endswith("_date")]
    xr.testing.assert_identical(done.drop_vars(moving), eager.drop_vars(moving))
    xr.testing.assert_allclose(done[moving], eager[moving], rtol=1e-6)


def test_flag_dataset_is_exported_and_reads_back(contiguous):
    assert qcflag.flag_dataset is flag_dataset
    out = flag_dataset(contiguous)
    # the result is itself a readable profile dataset: reading it keeps the flags as extras
    again = from_dataset(out)
    assert "temperature_flag_auto" in again.extra.columns


def test_not_a_profile_dataset():
    with pytest.raises(qcflag.QCFlagError, match="temperature"):
        flag_dataset(xr.Dataset({"x": ("obs", np.arange(3.0))}))
