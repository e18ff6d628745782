"""``qcflag inspect`` and ``qcflag convert`` through typer's CliRunner."""

from __future__ import annotations

import hashlib
import json
import shutil
from pathlib import Path

import pytest
from typer.testing import CliRunner

from qcflag.cli import app

DATA = Path(__file__).resolve().parent / "data"
CANONICAL = DATA / "canonical.csv"
runner = CliRunner()


def _sha(p: Path) -> str:
    return hashlib.sha256(p.read_bytes()).hexdigest()


def test_inspect_real_argo_prints_level_count(argo_files):
    f = next(p for p in argo_files if p.name == "R3901602_163.nc")
    res = runner.invoke(app, ["inspect", str(f)])
    assert res.exit_code == 0, res.output
    assert "levels:    76" in res.output
    assert "temperature: good 76" in res.output


def test_inspect_json_counts():
    res = runner.invoke(app, ["inspect", str(CANONICAL), "--json"])
    assert res.exit_code == 0, res.output
    info = json.loads(res.output)
    assert info["profiles"] == 3 and info["levels"] == 10
    assert info["cruises"] == {"DEMO2024A": 2, "DEMO2024B": 1}
    assert info["pressure_min"] == 1.0 and info["pressure_max"] == 1500.25
    # golden file: temperature flags 1,1,2,4,1 | 0,'',1,1 | ''
    assert info["flags"]["temperature"] == {"good": 5, "probably_good": 1, "bad": 1,
                                            "no_flag": 2, "not_evaluated": 1}


def test_convert_round_trip_byte_identical(tmp_path):
    nc, back = tmp_path / "a.nc", tmp_path / "b.csv"
    before = _sha(CANONICAL)
    r1 = runner.invoke(app, ["convert", str(CANONICAL), str(nc)])
    r2 = runner.invoke(app, ["convert", str(nc), str(back)])
    assert r1.exit_code == 0 and r2.exit_code == 0, r1.output + r2.output
    assert back.read_bytes() == CANONICAL.read_bytes()
    assert _sha(CANONICAL) == before
    # no overwrite without --overwrite, and the existing output is untouched
    old = _sha(back)
    res = runner.invoke(app, ["convert", str(nc), str(back)])
    assert res.exit_code == 1 and "--overwrite" in res.output and _sha(back) == old
    assert runner.invoke(app, ["convert", str(nc), str(back), "--overwrite"]).exit_code == 0


def test_convert_columns_option(tmp_path):
    src = tmp_path / "odd.csv"
    src.write_text("id,cr,when,y,x,P,T68,S\na,c,2020-01-01T00:00:00Z,1,2,3,4,35\n")
    out = tmp_path / "o.csv"
    res = runner.invoke(app, ["convert", str(src), str(out), "--columns",
                              "profile_id=id,cruise=cr,time=when,latitude=y,longitude=x,"
                              "pressure=P,temperature=T68,salinity=S"])
    assert res.exit_code == 0, res.output
    assert out.read_text().splitlines()[1] == "a,c,2020-01-01T00:00:00Z,1.0,2.0,3.0,4.0,35.0"


def _corrupt_header(path: Path) -> None:
    b = bytearray((DATA / "argo_synthetic.nc").read_bytes())
    b[12:16] = (0x7FFFFFF0).to_bytes(4, "big")  # first dimension's name length
    path.write_bytes(bytes(b))


BAD = {
    "missing_column.csv": ("profile_id,time,latitude,longitude,pressure,salinity\n"
                           "a,2020,1,1,1,35\n", "missing required column(s) temperature"),
    "non_numeric.csv": ("profile_id,cruise,time,latitude,longitude,pressure,temperature,"
                        "salinity\na,c,2020-01-01,1,1,1,ten,35\n", "non-numeric value 'ten'"),
    "unknown_flag.csv": ("profile_id,cruise,time,latitude,longitude,pressure,temperature,"
                         "salinity,temperature_flag\na,c,2020-01-01,1,1,1,10,35,7\n",
                         "flag code '7'"),
    "empty.csv": ("", "empty file"),
    "kelvin.csv": ("profile_id,cruise,time,latitude,longitude,pressure,temperature,salinity\n"
                   "a,c,2020-01-01,1,1,1,283.15,35\n", "kelvin"),
    "csv_named.nc": ("profile_id,cruise\n1,2\n", "not a NetCDF file"),
    "truncated.nc": (None, "truncated or corrupt"),
    "corrupt_header.nc": (None, "corrupt NetCDF header"),
}


@pytest.mark.parametrize("name", sorted(BAD))
@pytest.mark.parametrize("command", ["inspect", "convert"])
def test_bad_input_one_line_exit_1(tmp_path, name, command):
    text, needle = BAD[name]
    path = tmp_path / name
    if name == "truncated.nc":
        src = (DATA / "layout_contiguous.nc").read_bytes()
        path.write_bytes(src[: len(src) // 3])
    elif name == "corrupt_header.nc":
        _corrupt_header(path)
    else:
        path.write_text(text)
    before = _sha(path)
    out = tmp_path / "out.nc"
    args = ["inspect", str(path)] if command == "inspect" else ["convert", str(path), str(out)]
    res = runner.invoke(app, args)
    assert res.exit_code == 1, res.output
    assert "Traceback" not in res.output
    lines = res.output.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("error: ")
    assert str(path) in lines[0] and needle in lines[0], lines[0]
    assert _sha(path) == before
    assert not out.exists() and not list(tmp_path.glob(".out.nc.tmp-*"))


def test_inspect_folder_and_glob(tmp_path):
    for i in range(2):
        shutil.copy(CANONICAL, tmp_path / f"c{i}.csv")
    res = runner.invoke(app, ["inspect", str(tmp_path), "--json"])
    assert json.loads(res.output)["levels"] == 20
    res = runner.invoke(app, ["inspect", str(tmp_path / "c*.csv"), "--json"])
    assert json.loads(res.output)["files"] == 2
    res = runner.invoke(app, ["inspect", str(tmp_path / "nothing*.csv")])
    assert res.exit_code == 1 and "matches no file" in res.output
