"""Bad input end to end through the command line: one clear line, exit 1, nothing written.

Every case is run through ``inspect``, ``convert`` and rules-only ``flag`` with typer's
CliRunner; one real subprocess run of the ``qcflag`` console script proves that no
traceback reaches the user. Inputs are invented (the canonical golden CSV and layouts in
tests/data, edited), so every defect is known.
"""

from __future__ import annotations

import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from typer.testing import CliRunner

from qcflag.cli import app
from qcflag.io import read_csv, to_dataset
from qcflag.testing import file_digests

DATA = Path(__file__).resolve().parent / "data"
CANONICAL = DATA / "canonical.csv"
HIST = "2025-01-01T00:00:00Z qcflag test: golden"
HEADER = "profile_id,cruise,time,latitude,longitude,pressure,temperature,salinity"
ROW = "A1,C1,2021-03-01T12:00:00Z,-40.0,10.0,{p},{t},{s}"


def _rows(p=(2.0, 4.0, 6.0), t=(18.0, 17.9, 17.8), s=(35.4, 35.4, 35.3), extra=""):
    lines = [ROW.format(p=a, t=b, s=c) for a, b, c in zip(p, t, s, strict=True)]
    return HEADER + extra + "\n" + "\n".join(lines) + "\n"


def _netcdf(path: Path, **attrs: dict[str, str]) -> bytes:
    """The golden CSV as CF NetCDF with some variable attributes replaced."""
    ds = to_dataset(read_csv(CANONICAL), history=HIST)
    for var, new in attrs.items():
        ds[var].attrs.update(new)
    ds.to_netcdf(path, engine="netcdf4")
    return path.read_bytes()


def _bad_cases(tmp: Path) -> dict[str, tuple[str, bytes, tuple[str, ...]]]:
    """Case name -> (file name, content, words the error line must contain)."""
    contiguous = (DATA / "layout_contiguous.nc").read_bytes()
    classic = (DATA / "argo_synthetic.nc").read_bytes()
    scratch = tmp / "scratch.nc"
    return {
        "truncated_netcdf4": ("cut.nc", contiguous[: len(contiguous) // 2],
                              ("NetCDF", "fetch it again")),
        "truncated_classic_netcdf": ("cut_argo.nc", classic[: len(classic) * 3 // 5],
                                     ("NetCDF", "fetch it again")),
        "not_netcdf": ("text.nc", b"station,depth\n1,2\n", ("not a NetCDF file",)),
        "empty_netcdf": ("empty.nc", b"", ("empty file",)),
        "empty_csv": ("empty.csv", b"", ("empty file",)),
        "header_only_csv": ("header.csv", (HEADER + "\n").encode(), ("no data rows",)),
        "missing_column": ("nosal.csv", _rows().replace(",salinity", "").replace(
            ",35.4\n", "\n").replace(",35.3\n", "\n").encode(),
            ("missing required column(s) salinity", "--columns")),
        "non_numeric": ("text.csv", _rows(t=(18.0, "warm", 17.8)).encode(),
                        ("'temperature' line 3", "non-numeric", "'warm'")),
        "unknown_flag_code": ("flag7.csv", (HEADER + ",temperature_flag\n"
                                            + ROW.format(p=2, t=18, s=35) + ",7\n").encode(),
                              ("'temperature_flag'", "'7'", "valid", "--scheme")),
        "kelvin_values": ("kelvin.csv", _rows(t=(291.1, 291.0, 290.9)).encode(),
                          ("'temperature'", "kelvin")),
        "pascal_values": ("pascal.csv", _rows(p=(2e4, 4e4, 6e4)).encode(),
                          ("'pressure'", "pascal", "dbar")),
        "conductivity_values": ("cond.csv", _rows(s=(53.1, 53.0, 52.9)).encode(),
                                ("'salinity'", "conductivity")),
        "conductivity_units": ("cond_units.nc",
                               _netcdf(scratch, salinity={"units": "mS/cm"}),
                               ("'salinity'", "conductivity", "gsw.SP_from_C")),
        "kelvin_label_on_celsius": ("klabel.nc", _netcdf(scratch, temperature={"units": "K"}),
                                    ("'temperature'", "degrees Celsius", "units")),
        "depth_in_metres_as_pressure": ("depth.nc", _netcdf(scratch, pressure={"units": "m"}),
                                        ("'pressure'", "depth")),
    }


CASES = [
    "truncated_netcdf4", "truncated_classic_netcdf", "not_netcdf", "empty_netcdf",
    "empty_csv", "header_only_csv", "missing_column", "non_numeric", "unknown_flag_code",
    "kelvin_values", "pascal_values", "conductivity_values", "conductivity_units",
    "kelvin_label_on_celsius", "depth_in_metres_as_pressure",
]
COMMANDS = {
    "inspect": lambda src, out: ["inspect", src],
    "convert": lambda src, out: ["convert", src, out / "converted.nc"],
    "flag": lambda src, out: ["flag", src, "--out", out / "flagged.csv"],
}


@pytest.fixture(scope="module")
def bad_files(tmp_path_factory):
    root = tmp_path_factory.mktemp("bad")
    files = {}
    for name, (fname, content, needles) in _bad_cases(root).items():
        d = root / name
        d.mkdir()
        (d / fname).write_bytes(content)
        files[name] = (d / fname, needles)
    (root / "scratch.nc").unlink()
    return files


def _invoke(args):
    return CliRunner().invoke(app, [str(a) for a in args])


def assert_one_line_error(result, path: Path, needles=()) -> str:
    """Exit 1, exactly one ``error:`` line naming the file, no traceback.

    Other stderr lines may only be one-line ``warning:``s (e.g. rows dropped on the way).
    """
    assert result.exit_code == 1, (result.exit_code, result.output, result.exception)
    assert not isinstance(result.exception, Exception) or isinstance(
        result.exception, SystemExit), repr(result.exception)
    assert "Traceback" not in result.output
    lines = [ln for ln in result.stderr.splitlines() if ln.strip()]
    errors = [ln for ln in lines if ln.startswith("error: ")]
    assert len(errors) == 1, lines
    assert all(ln.startswith(("error: ", "warning: ")) for ln in lines), lines
    assert path.name in errors[0], errors[0]
    for n in needles:
        assert n in errors[0], (n, errors[0])
    return errors[0]


def test_every_case_is_listed(bad_files):
    assert sorted(CASES) == sorted(bad_files)


@pytest.mark.parametrize("command", sorted(COMMANDS))
@pytest.mark.parametrize("case", CASES)
def test_bad_input_refused_with_one_line(bad_files, tmp_path, case, command):
    path, needles = bad_files[case]
    before = file_digests([path.parent])
    out = tmp_path / "out"
    result = _invoke(COMMANDS[command](path, out))
    assert_one_line_error(result, path, needles)
    assert file_digests([path.parent]) == before  # input untouched, nothing added beside it
    leftovers = list(out.rglob("*")) if out.exists() else []
    assert leftovers == []  # no partial output and no temporary file


def test_console_script_prints_no_traceback(bad_files, tmp_path):
    # a real process: what a data manager's cron job sees
    exe = shutil.which("qcflag")
    cmd = [exe] if exe else [sys.executable, "-c", "from qcflag.cli import main; main()"]
    for case in ("truncated_netcdf4", "kelvin_values", "non_numeric"):
        path, needles = bad_files[case]
        proc = subprocess.run([*cmd, "flag", str(path), "--out", str(tmp_path / "o.csv")],
                              capture_output=True, text=True, timeout=120, check=False)
        assert proc.returncode == 1, proc.stderr
        assert "Traceback" not in proc.stderr and proc.stdout == ""
        lines = proc.stderr.strip().splitlines()
        assert len(lines) == 1 and lines[0].startswith("error: "), lines
        assert path.name in lines[0] and all(n in lines[0] for n in needles)
        assert not (tmp_path / "o.csv").exists()
        assert not [f for f in tmp_path.iterdir() if f.name.startswith(".o.csv")]


# ----------------------------------------------------------------- inputs that must work
def _flag(src: Path, out: Path) -> pd.DataFrame:
    result = _invoke(["flag", src, "--out", out])
    assert result.exit_code == 0, (result.output, result.exception)
    return pd.read_csv(out, dtype=str, keep_default_na=False)


def test_csv_cut_mid_line_flags_complete_rows_and_says_how_many_dropped(tmp_path):
    full = CANONICAL.read_bytes()
    src = tmp_path / "cut.csv"
    src.write_bytes(full[: full.rstrip(b"\n").rfind(b"\n") + 20])  # last line cut short
    n_complete = src.read_bytes().count(b"\n") - 1
    for args in (["inspect", src], ["flag", src, "--out", tmp_path / "o.csv"]):
        result = _invoke(args)
        assert result.exit_code == 0, (result.output, result.exception)
        warn = [ln for ln in result.stderr.splitlines() if ln.strip()]
        assert warn == [f"warning: {src}: the last line is cut short; dropped 1 incomplete row"]
    assert len(pd.read_csv(tmp_path / "o.csv")) == n_complete


def test_single_level_profile_is_flagged(tmp_path):
    src = tmp_path / "one.csv"
    src.write_text(_rows() + "B1,C1,2021-03-02T12:00:00Z,-40.5,10.5,5.0,18.1,35.4\n")
    out = _flag(src, tmp_path / "o.csv")
    assert len(out) == 4 and out["profile_id"].tolist()[-1] == "B1"
    assert out["temperature_flag_auto"].iloc[-1] in {"1", "2", "3", "4"}


@pytest.mark.parametrize("pressures", [(2.0, 4.0, 4.0, 6.0), (2.0, 6.0, 4.0, 8.0)],
                         ids=["duplicated", "decreasing"])
def test_duplicated_or_decreasing_pressure_is_flagged_not_fatal(tmp_path, pressures):
    src = tmp_path / "p.csv"
    src.write_text(_rows(p=pressures, t=(18.0, 17.95, 17.9, 17.85), s=(35.4,) * 4))
    out = _flag(src, tmp_path / "o.csv")
    assert len(out) == 4
    # Argo real-time test 8 (pressure increasing, Argo QC manual): the level that does not
    # increase is flagged bad; the levels before it pass
    auto = out["pressure_flag_auto"].tolist()
    assert auto[2] in {"3", "4"} and auto[:2] == ["1", "1"], auto
    assert "pressure" in out["pressure_flag_auto_reasons"].iloc[2]


def test_fill_values_and_nans_become_missing_not_bad(tmp_path):
    src = tmp_path / "f.csv"
    src.write_text(_rows(p=(2.0, 4.0, 6.0, 8.0), t=(18.0, -999, "NaN", 17.7),
                         s=(35.4, 35.4, "", 35.3)))
    out = _flag(src, tmp_path / "o.csv")
    # Argo reference table 2: 9 = missing value
    assert out["temperature_flag_auto"].tolist()[1:3] == ["9", "9"]
    assert out["salinity_flag_auto"].iloc[2] == "9"
    assert out["temperature_flag_auto"].iloc[0] != "9"


def test_empty_profile_in_netcdf_dropped_and_all_empty_refused(tmp_path):
    b = read_csv(CANONICAL)
    ds = to_dataset(b, history=HIST)
    # a fourth profile with no level (row_size 0; CF 9.3.3 allows it for unwritten casts)
    ds2 = ds.isel(profile=[0, 1, 2, 0])
    ds2["row_size"] = ("profile", np.append(ds["row_size"].values, 0), ds["row_size"].attrs)
    ds2["profile_id"].values[3] = "EMPTY"
    ds2.to_netcdf(tmp_path / "one_empty.nc")
    result = _invoke(["flag", tmp_path / "one_empty.nc", "--out", tmp_path / "o.csv"])
    assert result.exit_code == 0, (result.output, result.exception)
    out = pd.read_csv(tmp_path / "o.csv", dtype=str)
    assert len(out) == b.n_levels and "EMPTY" not in set(out["profile_id"])
    # every profile empty: nothing to flag, refused
    none = ds.isel(obs=slice(0, 0))
    none["row_size"] = ("profile", np.zeros(ds.sizes["profile"], np.int64),
                        ds["row_size"].attrs)
    none.to_netcdf(tmp_path / "all_empty.nc")
    assert_one_line_error(_invoke(["inspect", tmp_path / "all_empty.nc"]),
                          tmp_path / "all_empty.nc", ("no levels",))


def test_all_missing_values_flagged_missing_not_bad(tmp_path):
    ds = to_dataset(read_csv(CANONICAL), history=HIST)
    for v in ("pressure", "temperature", "salinity"):
        ds[v].values[:] = np.nan
    ds.to_netcdf(tmp_path / "all_nan.nc")
    out = _flag(tmp_path / "all_nan.nc", tmp_path / "o.csv")
    for v in ("temperature", "salinity"):
        assert set(out[f"{v}_flag_auto"]) == {"9"}, v  # Argo table 2: 9 missing, never 4


def test_fuzz_through_the_cli(tmp_path):
    # tests/test_io_fuzz.py fuzzes the readers; this runs mutants through the command,
    # where the guard must turn every refusal into one line (fixed seed: reproducible)
    rng = np.random.default_rng(90210)
    src = CANONICAL.read_bytes()
    for i in range(40):
        b = bytearray(src)
        for _ in range(int(rng.integers(1, 6))):
            j = int(rng.integers(0, len(b)))
            b[j] = int(rng.choice(list(b",\n\"-.0123456789eE x\x00")))
        if i % 4 == 0:
            b = b[: int(rng.integers(0, len(b)))]
        p = tmp_path / f"m{i}.csv"
        p.write_bytes(bytes(b))
        result = _invoke(["flag", p, "--out", tmp_path / f"o{i}.csv"])
        if result.exit_code == 0:
            assert (tmp_path / f"o{i}.csv").exists()
        else:
            assert_one_line_error(result, p)
            assert not (tmp_path / f"o{i}.csv").exists()
