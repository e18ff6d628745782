"""Argo-format reader: the real profiles in ../shared/data/argo and an invented skeleton."""

from __future__ import annotations

from pathlib import Path

import netCDF4
import numpy as np

from qcflag.io import read_files, read_netcdf

DATA = Path(__file__).resolve().parent / "data"

# Level counts of the three real Argo profiles, counted independently in
# test_real_argo_matches_independent_netcdf4_read (PRES not fill); listed in the task brief.
EXPECTED_LEVELS = {"D4900785_048.nc": 75, "D4901052_069.nc": 72, "R3901602_163.nc": 76}


def _independent(path: Path) -> tuple[np.ndarray, list[str]]:
    """PRES_ADJUSTED (A/D) or PRES (R), read with netCDF4 per Argo manual section 3.3."""
    with netCDF4.Dataset(path) as nc:
        nc.set_auto_mask(False)
        mode = nc["DATA_MODE"][:].tobytes().decode()[0]
        name = "PRES" if mode == "R" else "PRES_ADJUSTED"
        pres = nc[name][0].astype(np.float64)
        qc = nc[f"TEMP{'' if mode == 'R' else '_ADJUSTED'}_QC"][0].tobytes().decode()
    keep = np.abs(pres - 99999.0) > 1e-3
    return pres[keep], [c for c, k in zip(qc, keep, strict=True) if k]


def test_real_argo_matches_independent_netcdf4_read(argo_files):
    for f in argo_files:
        b = read_netcdf(f)
        pres, tqc = _independent(f)
        assert b.n_levels == EXPECTED_LEVELS[f.name] == pres.size
        np.testing.assert_array_equal(b.pressure, pres)
        assert set(tqc) == {"1"}
        for v in ("pressure", "temperature", "salinity"):
            assert (b.flags[v] == 1).all(), (f.name, v)
        wmo, cycle = f.stem[1:].split("_")
        assert b.profiles["profile_id"].iloc[0] == f"{wmo}_{cycle}"
        assert b.profiles["cruise"].iloc[0] == wmo
        assert b.scheme == "argo"


def test_real_argo_folder_concatenates(argo_files):
    b = read_files(argo_files[0].parent)
    assert b.n_levels == sum(EXPECTED_LEVELS.values()) and b.n_profiles == 3


def test_synthetic_argo_modes_padding_and_ids():
    b = read_netcdf(DATA / "argo_synthetic.nc")
    # profile 0 is delayed mode -> adjusted values; profile 1 real time -> raw values with
    # the fill levels (PRES = 99999) dropped
    assert b.counts.tolist() == [5, 3]
    np.testing.assert_array_equal(b.pressure, [5.5, 10.5, 20.5, 30.5, 40.5, 4.0, 8.0, 16.0])
    np.testing.assert_array_equal(b.temperature[:5],
                                  np.float32([15.25, 14.75, 13.25, 12.25, 11.25]))
    assert b.flags["temperature"].tolist() == [1, 1, 1, 4, 4, 1, 2, 1]
    assert b.flags["salinity"].tolist() == [1, 2, 1, 1, 1, 1, 1, 1]
    assert b.profiles["profile_id"].tolist() == ["6900001_007", "6900001_008D"]
    assert b.profiles["data_mode"].tolist() == ["D", "R"]
    # JULD 26000.25 days after 1950-01-01 (days since epoch, Argo manual section 3)
    assert b.profiles["time"].iloc[0] == np.datetime64("1950-01-01T06:00") + np.timedelta64(
        26000, "D")


def test_argo_blank_flags_are_no_flag(tmp_path):
    src = DATA / "argo_synthetic.nc"
    p = tmp_path / "blank.nc"
    p.write_bytes(src.read_bytes())
    with netCDF4.Dataset(p, "a") as nc:
        nc["TEMP_QC"][1, 0] = b" "
    b = read_netcdf(p)
    assert b.flags["temperature"][5] == -1
