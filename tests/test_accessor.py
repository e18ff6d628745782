"""The ds.qcflag accessor: registered by ``import qcflag``, forwards to qcflag.chain, never
mutates, and gives the same flags as the command line on the same file."""

from __future__ import annotations

import numpy as np
import pytest
import xarray as xr
from typer.testing import CliRunner

import qcflag
from qcflag.accessor import QCFlagAccessor
from qcflag.cli import app
from qcflag.io import write
from qcflag.simulate import SimulationConfig, simulate_archive

HISTORY = "2024-05-06T07:08:09Z qcflag test: fixed history line"
FLAG_VARS = ("temperature_flag_auto", "salinity_flag_auto", "temperature_flag_auto_reasons",
             "salinity_flag_auto_confidence")


@pytest.fixture(scope="module")
def cast_file(tmp_path_factory):
    cfg = SimulationConfig(casts_per_cruise=4, floats_per_cruise=1, max_cast_pressure=500)
    b = simulate_archive(1, seed=21, config=cfg)
    path = tmp_path_factory.mktemp("acc") / "casts.nc"
    write(b, path)
    return path


@pytest.fixture(scope="module")
def cli_output(cast_file, tmp_path_factory):
    out = tmp_path_factory.mktemp("cli") / "flagged.nc"
    res = CliRunner().invoke(app, ["flag", str(cast_file), "-o", str(out)])
    assert res.exit_code == 0, res.output
    # raw codes: the writer stores -128 where a level carries no flag
    with xr.open_dataset(out, mask_and_scale=False) as ds:
        return ds.load()


def test_registered_by_import_qcflag():
    ds = xr.Dataset()
    assert isinstance(ds.qcflag, QCFlagAccessor)
    assert ds.qcflag._ds is ds
    assert vars(ds.qcflag) == {"_ds": ds}  # stores the dataset and nothing else
    assert qcflag.flag_dataset.__module__ == "qcflag.chain"


def test_accessor_and_flag_dataset_equal_the_cli(cast_file, cli_output):
    with xr.open_dataset(cast_file) as ds:
        ds = ds.load()
    before = ds.copy(deep=True)
    via_accessor = ds.qcflag.flag(history=HISTORY)
    via_function = qcflag.flag_dataset(ds, history=HISTORY)
    xr.testing.assert_identical(ds, before)  # never mutated
    xr.testing.assert_identical(via_accessor, via_function)
    for name in FLAG_VARS:
        a = via_accessor[name].values
        c = cli_output[name].values
        if a.dtype.kind == "f":
            np.testing.assert_allclose(a, c, rtol=0, atol=0, equal_nan=True, err_msg=name)
        else:
            np.testing.assert_array_equal(a.astype(c.dtype), c, err_msg=name)
    assert (via_accessor["temperature_flag_auto"].values >= 1).any()


def test_accessor_on_a_lazy_file_equals_the_cli(cast_file, cli_output):
    with xr.open_dataset(cast_file, chunks={"obs": 700}) as ds:
        out = ds.qcflag.flag(history=HISTORY)
        assert out["temperature_flag_auto"].chunks is not None
        done = out.compute()
    np.testing.assert_array_equal(done["temperature_flag_auto"].values,
                                  cli_output["temperature_flag_auto"].values)


def test_check_forwards(cast_file):
    with xr.open_dataset(cast_file) as ds:
        ds = ds.load()
    out = ds.qcflag.check(history=HISTORY)
    ref = qcflag.check_dataset(ds, history=HISTORY)
    # the date check's statistic counts days until "now", which moves on between runs
    moving = [v for v in ref.data_vars if str(v).endswith("_date")]
    xr.testing.assert_identical(out.drop_vars(moving), ref.drop_vars(moving))
    assert "temperature_spike_grade" in out
    assert set(np.unique(out["temperature_spike_grade"].values)) <= {0, 1, 3, 4}
