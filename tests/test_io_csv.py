"""Canonical CSV reader/writer: golden file, aliases, round trips, bad input, properties."""

from __future__ import annotations

import hashlib
import importlib.util
import math
from pathlib import Path

import gsw
import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from qcflag import ProfileBatch, QCFlagError, UnitsError
from qcflag.exceptions import OutputExistsError
from qcflag.io import (
    AddedColumn,
    TruncatedInputWarning,
    read_csv,
    read_files,
    write,
    write_csv,
)

DATA = Path(__file__).resolve().parent / "data"
CANONICAL = DATA / "canonical.csv"


def _golden():
    spec = importlib.util.spec_from_file_location("make_golden", DATA / "make_golden.py")
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    return mod


G = _golden()


def _sha(p: Path) -> str:
    return hashlib.sha256(p.read_bytes()).hexdigest()


def test_golden_csv_values_and_flags():
    b = read_csv(CANONICAL)
    assert b.n_profiles == 3
    assert b.counts.tolist() == [len(p["pressure"]) for p in G.PROFILES]
    for var in ("pressure", "temperature", "salinity"):
        want = np.concatenate([np.asarray(p[var], float) for p in G.PROFILES])
        np.testing.assert_array_equal(b.values(var), want)
        codes = [c for p in G.PROFILES for c in p[f"{var}_flag"]]
        want_codes = [-1 if c == "" else int(c) for c in codes]
        assert b.flags[var].tolist() == want_codes
    assert b.profiles["operator"].tolist() == ["jd", "jd", "mk"]  # per-profile column
    assert list(b.extra.columns) == ["oxygen", "comment"]
    assert b.profiles["time"].iloc[1] == pd.Timestamp("2024-01-14T18:05:31")
    assert b.profiles["platform"].tolist() == ["RV Invented", "RV Invented", ""]


def test_csv_rewrite_is_byte_identical(tmp_path):
    out = tmp_path / "again.csv"
    write_csv(read_csv(CANONICAL), out)
    assert out.read_bytes() == CANONICAL.read_bytes()


def test_csv_to_netcdf_to_csv_byte_identical(tmp_path):
    before = _sha(CANONICAL)
    nc = write(read_csv(CANONICAL), tmp_path / "x.nc", history="2025-01-01T00:00:00Z t")
    back = write(read_files(nc), tmp_path / "back.csv")
    assert back.read_bytes() == CANONICAL.read_bytes()
    assert _sha(CANONICAL) == before  # input untouched


def test_aliases_case_insensitive_and_flag_columns(tmp_path):
    p = tmp_path / "alias.csv"
    p.write_text(
        "STATION,EXPOCODE,Date,LAT,Lon,CTDPRS,CTDTMP,CTDSAL,CTDTMP_FLAG_W,CTDSAL_FLAG_W\n"
        "1,33RR20230101,2023-01-02T03:04:05,10.5,20.25,2,15.5,35.1,2,3\n"
        "1,33RR20230101,2023-01-02T03:04:05,10.5,20.25,4,15.25,35.2,2,2\n"
    )
    b = read_csv(p, scheme="woce_ctd")
    assert b.profiles["profile_id"].tolist() == ["1"]
    assert b.profiles["cruise"].tolist() == ["33RR20230101"]
    assert b.flags["temperature"].tolist() == [2, 2]
    assert b.flags["salinity"].tolist() == [3, 2]
    assert b.scheme == "woce_ctd"


def test_explicit_columns_mapping(tmp_path):
    p = tmp_path / "m.csv"
    p.write_text("id,cr,when,y,x,P,T68,S,TQ\na,c,2020-01-01T00:00:00Z,1,2,3,4,35,1\n")
    cols = {"profile_id": "id", "cruise": "cr", "time": "when", "latitude": "y",
            "longitude": "x", "pressure": "P", "temperature": "T68", "salinity": "S",
            "temperature_flag": "TQ"}
    b = read_csv(p, columns=cols)
    assert b.temperature.tolist() == [4.0] and b.flags["temperature"].tolist() == [1]


def test_interleaved_rows_grouped_by_profile(tmp_path):
    p = tmp_path / "il.csv"
    p.write_text("profile_id,cruise,time,latitude,longitude,pressure,temperature,salinity\n"
                 "a,c,2020-01-01,1,1,1,10,35\n"
                 "b,c,2020-01-01,1,1,5,20,35\n"
                 "a,c,2020-01-01,1,1,2,11,35\n")
    b = read_csv(p)
    assert b.profiles["profile_id"].tolist() == ["a", "b"]
    assert b.pressure.tolist() == [1.0, 2.0, 5.0]


def test_fill_values_and_nan_read_as_missing(tmp_path):
    # -999 is the WHP-Exchange fill (formats-and-conventions.md section 4), 99999 Argo's
    p = tmp_path / "f.csv"
    p.write_text("profile_id,cruise,time,latitude,longitude,pressure,temperature,salinity\n"
                 "a,c,2020-01-01,1,1,1,-999,99999\n"
                 "a,c,2020-01-01,1,1,2,NaN,-9999.0\n"
                 "a,c,2020-01-01,1,1,3,,35\n")
    b = read_csv(p)
    assert np.isnan(b.temperature).all()
    assert np.isnan(b.salinity[:2]).all() and b.salinity[2] == 35.0


def test_depth_column_converted_with_gsw(tmp_path):
    p = tmp_path / "d.csv"
    p.write_text("profile_id,cruise,time,latitude,longitude,depth,temperature,salinity\n"
                 "a,c,2020-01-01,-45,1,1000,4,35\n")
    b = read_csv(p)
    # TEOS-10 gsw.p_from_z with z = -depth is the reference
    assert b.pressure[0] == pytest.approx(float(gsw.p_from_z(-1000.0, -45.0)), rel=1e-12)
    assert 1000 < b.pressure[0] < 1020
    assert any("gsw.p_from_z" in n for n in b.attrs["notes"])


def test_single_level_and_decreasing_pressures_accepted(tmp_path):
    b = read_csv(CANONICAL)
    assert b.counts[-1] == 1
    assert (np.diff(b.pressure[5:9]) <= 0).any()


@pytest.mark.parametrize(
    ("text", "needle"),
    [
        ("", "empty file"),
        ("profile_id,cruise,time,latitude,longitude,pressure,temperature,salinity\n",
         "no data rows"),
        ("profile_id,time,latitude,longitude,pressure,salinity\na,2020,1,1,1,35\n",
         "missing required column(s) temperature"),
        ("profile_id,cruise,time,latitude,longitude,pressure,temperature,salinity\n"
         "a,c,2020-01-01,1,1,1,ten,35\n", "column 'temperature' line 2 has a non-numeric "
         "value 'ten'"),
        ("profile_id,cruise,time,latitude,longitude,pressure,temperature,salinity\n"
         "a,c,yesterday,1,1,1,10,35\n", "not ISO 8601"),
        ("profile_id,cruise,time,latitude,longitude,pressure,temperature,salinity,"
         "temperature_flag\na,c,2020-01-01,1,1,1,10,35,7\n", "'7'"),
    ],
)
def test_bad_csv_gives_one_line_error(tmp_path, text, needle):
    p = tmp_path / "bad.csv"
    p.write_text(text)
    with pytest.raises(QCFlagError) as err:
        read_csv(p)
    msg = str(err.value)
    assert needle in msg and str(p) in msg and "\n" not in msg


def test_unknown_flag_code_lists_valid_codes(tmp_path):
    p = tmp_path / "bad.csv"
    p.write_text("profile_id,cruise,time,latitude,longitude,pressure,temperature,salinity,"
                 "temperature_flag\na,c,2020-01-01,1,1,1,10,35,X\n")
    with pytest.raises(QCFlagError, match=r"valid.*0 1 2 3 4 5 8 9"):
        read_csv(p)


def test_cut_last_line_dropped_with_warning(tmp_path):
    full = CANONICAL.read_bytes()
    p = tmp_path / "cut.csv"
    p.write_bytes(full[: full.rstrip(b"\n").rfind(b"\n") + 20])  # last line cut short
    with pytest.warns(TruncatedInputWarning, match="dropped 1"):
        b = read_csv(p)
    assert b.n_levels == 9 and b.attrs["dropped_rows"] == 1


@pytest.mark.parametrize(
    ("column", "values", "needle"),
    [
        ("temperature", "290,291", "kelvin"),          # median > 100 => kelvin
        ("pressure", "150000,200000", "pascal"),       # > 15000 dbar => not dbar
        ("salinity", "52,53", "conductivity"),         # median > 45 => mS/cm
    ],
)
def test_plainly_wrong_units_refused(tmp_path, column, values, needle):
    cols = {"pressure": "1,2", "temperature": "10,11", "salinity": "35,35"}
    cols[column] = values
    rows = [f"a,c,2020-01-01,1,1,{cols['pressure'].split(',')[i]},"
            f"{cols['temperature'].split(',')[i]},{cols['salinity'].split(',')[i]}"
            for i in range(2)]
    p = tmp_path / "u.csv"
    p.write_text("profile_id,cruise,time,latitude,longitude,pressure,temperature,salinity\n"
                 + "\n".join(rows) + "\n")
    with pytest.raises(UnitsError, match=needle):
        read_csv(p)


def test_conductivity_column_refused_by_name(tmp_path):
    p = tmp_path / "c.csv"
    p.write_text("profile_id,cruise,time,latitude,longitude,pressure,temperature,CNDC\n"
                 "a,c,2020-01-01,1,1,1,10,4.2\n")
    with pytest.raises(UnitsError, match="conductivity"):
        read_csv(p, columns={"salinity": "CNDC"})


def test_added_columns_written_after_and_no_overwrite(tmp_path):
    b = read_csv(CANONICAL)
    codes = np.full(b.n_levels, 1, np.int8)
    codes[3] = 4
    codes[0] = -1
    added = {"temperature_flag_auto": AddedColumn(codes, {"flag_values": [1, 4]}, "temperature"),
             "temperature_flag_auto_confidence": AddedColumn(np.linspace(0, 1, b.n_levels))}
    out = write_csv(b, tmp_path / "o.csv", added=added)
    t = pd.read_csv(out, dtype=str, keep_default_na=False)
    assert list(t.columns[-2:]) == list(added)
    assert t["temperature_flag_auto"].tolist()[:4] == ["", "1", "1", "4"]
    with pytest.raises(OutputExistsError):
        write_csv(b, out)
    write_csv(b, out, overwrite=True)
    assert "temperature_flag_auto" not in out.read_text().splitlines()[0]


# ---------------------------------------------------------------- property test
_finite = st.floats(min_value=-1e6, max_value=1e6, allow_nan=False, allow_subnormal=True)
_value = st.one_of(_finite, st.just(math.nan))


@st.composite
def batches(draw):
    n_prof = draw(st.integers(1, 4))
    counts = draw(st.lists(st.integers(1, 5), min_size=n_prof, max_size=n_prof))
    n = sum(counts)
    vals = {k: np.array(draw(st.lists(_value, min_size=n, max_size=n)))
            for k in ("pressure", "temperature", "salinity")}
    vals["pressure"] = np.abs(vals["pressure"]) % 12000
    vals["temperature"] = np.clip(vals["temperature"], -2.5, 40)
    vals["salinity"] = np.clip(vals["salinity"], 0, 42)
    times = draw(st.lists(st.integers(0, 2_000_000_000_000), min_size=n_prof,
                          max_size=n_prof))
    unit = draw(st.sampled_from(["s", "ms", "us"]))
    codes = st.sampled_from([-1, 0, 1, 2, 3, 4, 5, 8, 9])
    ids = [f"p{i}" for i in range(n_prof)]
    profiles = pd.DataFrame({
        "profile_id": ids,
        "cruise": draw(st.lists(st.sampled_from(["c1", "c,2", "c 3"]), min_size=n_prof,
                                max_size=n_prof)),
        "time": np.array(times, dtype=f"datetime64[{unit}]").astype("datetime64[ns]"),
        "latitude": draw(st.lists(st.floats(-90, 90), min_size=n_prof, max_size=n_prof)),
        "longitude": draw(st.lists(st.floats(-180, 180), min_size=n_prof, max_size=n_prof)),
        "platform": draw(st.lists(st.sampled_from(["", "ship"]), min_size=n_prof,
                                  max_size=n_prof)),
    })
    flags = {k: np.array(draw(st.lists(codes, min_size=n, max_size=n)), np.int8)
             for k in draw(st.sets(st.sampled_from(["pressure", "temperature", "salinity"])))}
    return ProfileBatch(offsets=np.concatenate([[0], np.cumsum(counts)]), profiles=profiles,
                        flags=flags, **vals)


@settings(max_examples=40, deadline=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(batch=batches())
def test_property_csv_round_trip(tmp_path, batch):
    out = write_csv(batch, tmp_path / "p.csv", overwrite=True)
    back = read_csv(out)
    assert back.counts.tolist() == batch.counts.tolist()
    for v in ("pressure", "temperature", "salinity"):
        np.testing.assert_array_equal(back.values(v), batch.values(v))
        if v in batch.flags:
            np.testing.assert_array_equal(back.flags[v], batch.flags[v])
    for c in ("profile_id", "cruise", "platform", "latitude", "longitude", "time"):
        assert back.profiles[c].tolist() == batch.profiles[c].tolist(), c
    again = write_csv(back, tmp_path / "q.csv", overwrite=True)
    assert again.read_bytes() == out.read_bytes()
