"""CF DSG NetCDF reader (four layouts) and CF contiguous-ragged writer."""

from __future__ import annotations

import hashlib
import importlib.util
from pathlib import Path

import netCDF4
import numpy as np
import pytest
import xarray as xr

from qcflag import InputFileError, UnitsError
from qcflag.io import (
    AddedColumn,
    from_dataset,
    read_csv,
    read_netcdf,
    to_dataset,
    write_csv,
    write_netcdf,
)
from qcflag.schemes import SCHEMES

DATA = Path(__file__).resolve().parent / "data"
CANONICAL = DATA / "canonical.csv"
HIST = "2025-01-01T00:00:00Z qcflag 0.0: test"


def _golden():
    spec = importlib.util.spec_from_file_location("make_golden", DATA / "make_golden.py")
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    return mod


G = _golden()


@pytest.mark.parametrize("layout", ["contiguous", "indexed", "incomplete"])
def test_layouts_match_canonical_csv(tmp_path, layout):
    """Each CF DSG layout (CF-1.13 ch. 9; files written independently with netCDF4)."""
    path = DATA / f"layout_{layout}.nc"
    before = hashlib.sha256(path.read_bytes()).hexdigest()
    b = read_netcdf(path)
    ref = read_csv(CANONICAL)
    assert b.counts.tolist() == ref.counts.tolist()
    for v in ("pressure", "temperature", "salinity"):
        np.testing.assert_array_equal(b.values(v), ref.values(v))
        np.testing.assert_array_equal(b.flags[v], ref.flags[v])
    for c in ("profile_id", "cruise", "platform", "time", "latitude", "longitude"):
        assert b.profiles[c].tolist() == ref.profiles[c].tolist()
    # the per-test spike flags are not taken for the manual flags, they are kept as extras
    assert "TEMP_spike_test" in b.extra.columns
    # NetCDF -> CSV keeps every value and flag: the canonical columns come out identical
    out = write_csv(b, tmp_path / "o.csv")
    got = out.read_text().splitlines()
    want = CANONICAL.read_text().splitlines()
    n = 12  # profile_id ... salinity_flag
    assert [",".join(r.split(",")[:n]) for r in got[1:]] == \
        [",".join(r.split(",")[:n]) for r in want[1:]]
    assert hashlib.sha256(path.read_bytes()).hexdigest() == before


def test_orthogonal_layout():
    b = read_netcdf(DATA / "layout_orthogonal.nc")
    assert b.counts.tolist() == [4, 4]
    np.testing.assert_array_equal(b.pressure, G.ORTHO_PRESSURE * 2)
    want_t = np.concatenate([np.float32(p["temperature"]) for p in G.ORTHO]).astype(float)
    np.testing.assert_array_equal(b.temperature, want_t)
    assert b.flags["temperature"].tolist() == [int(c) for p in G.ORTHO
                                               for c in p["temperature_flag"]]
    assert b.profiles["profile_id"].tolist() == ["O1", "O2"]
    # days since 1950-01-01: 27000.5 days -> 2023-12-04T12:00 (computed with numpy)
    assert b.profiles["time"].iloc[1] == np.datetime64("1950-01-01") + np.timedelta64(
        27000 * 24 + 12, "h")


def test_writer_cf_attributes():
    b = read_csv(CANONICAL)
    ds = to_dataset(b, history=HIST)
    assert ds.attrs["featureType"] == "profile"
    assert ds.attrs["Conventions"] == "CF-1.13 ACDD-1.3"
    assert ds.attrs["history"].endswith(HIST)
    assert ds.attrs["date_created"] == "2025-01-01T00:00:00Z"
    assert ds["row_size"].attrs["sample_dimension"] == "obs"
    assert ds["row_size"].values.tolist() == b.counts.tolist()
    assert ds["profile_id"].attrs["cf_role"] == "profile_id"
    assert ds["pressure"].attrs["standard_name"] == "sea_water_pressure"
    assert ds["pressure"].attrs["units"] == "dbar" and ds["pressure"].attrs["axis"] == "Z"
    assert ds["temperature"].attrs["units_metadata"] == "temperature: on_scale"
    assert ds["salinity"].attrs["standard_name"] == "sea_water_practical_salinity"
    assert ds["salinity"].attrs["units"] == "1"
    qc = ds["temperature_qc"]
    assert qc.dtype == np.int8 and qc.encoding["_FillValue"] == -128
    argo = SCHEMES["argo"]
    assert qc.attrs["flag_values"].tolist() == argo.values.tolist()
    assert qc.attrs["flag_meanings"].split() == argo.meanings
    # CF 3.5: one token per value, tokens only alphanumerics and _-.+@
    assert len(qc.attrs["flag_meanings"].split()) == len(qc.attrs["flag_values"])
    assert all(set(t) <= set("abcdefghijklmnopqrstuvwxyzABCDEFGHIJKLMNOPQRSTUVWXYZ0123456789_-.+@")
               for t in qc.attrs["flag_meanings"].split())
    assert ds["temperature"].attrs["ancillary_variables"] == "temperature_qc"
    assert (qc.values == -128).sum() == int((b.flags["temperature"] == -1).sum())


def test_written_file_is_cf_readable_and_deterministic(tmp_path):
    b = read_csv(CANONICAL)
    a = write_netcdf(b, tmp_path / "a.nc", history=HIST)
    c = write_netcdf(b, tmp_path / "c.nc", history=HIST)
    assert a.read_bytes() == c.read_bytes()
    with netCDF4.Dataset(a) as nc:  # independent reader
        assert nc.dimensions["obs"].size == b.n_levels
        assert nc["temperature_qc"].dtype == np.int8
        np.testing.assert_array_equal(nc["salinity"][:].filled(np.nan), b.salinity)


def test_history_appended_to_existing(tmp_path):
    b = read_csv(CANONICAL)
    first = read_netcdf(write_netcdf(b, tmp_path / "1.nc", history=HIST))
    second = to_dataset(first, history="qcflag convert a b")
    lines = second.attrs["history"].splitlines()
    assert lines[0] == HIST
    assert lines[1].endswith("qcflag convert a b") and lines[1][:4].isdigit()


def test_added_columns_linked_and_read_back_as_extras(tmp_path):
    b = read_csv(CANONICAL)
    codes = np.ones(b.n_levels, np.int8)
    codes[0] = -1
    argo = SCHEMES["argo"]
    added = {
        "temperature_flag_auto": AddedColumn(
            codes, {"standard_name": "aggregate_quality_flag", "flag_values": argo.values,
                    "flag_meanings": " ".join(argo.meanings)}, "temperature"),
        "temperature_flag_auto_reasons": AddedColumn(np.array([""] * b.n_levels, object)),
    }
    p = write_netcdf(b, tmp_path / "a.nc", added=added, history=HIST)
    with netCDF4.Dataset(p) as nc:
        assert nc["temperature"].ancillary_variables == "temperature_qc temperature_flag_auto"
        assert nc["temperature_flag_auto"][:].mask[0]
    back = read_netcdf(p)
    # the manual flags stay the manual flags; the automatic ones come back as a column
    np.testing.assert_array_equal(back.flags["temperature"], b.flags["temperature"])
    assert back.extra["temperature_flag_auto"].tolist()[:2] == ["", "1"]
    # writing again with the same added names replaces, does not clash
    write_netcdf(back, tmp_path / "b.nc", added=added, history=HIST)


def test_scheme_detected_from_flag_meanings(tmp_path):
    text = CANONICAL.read_text().replace(",0,0,jd", ",1,1,jd")
    p = tmp_path / "l20.csv"
    p.write_text(text.replace(",35.41,4,1,1,jd", ",35.41,A,1,1,jd"))
    b = read_csv(p, scheme="l20")
    nc = write_netcdf(b, tmp_path / "l20.nc", history=HIST)
    back = read_netcdf(nc)  # no scheme given: the file's flag_meanings say L20
    assert back.scheme == "l20"
    np.testing.assert_array_equal(back.flags["pressure"], b.flags["pressure"])
    assert ord("A") in back.flags["pressure"].tolist()


def _tiny(tmp_path: Path, *, t_units="degree_Celsius", t=(10.0, 11.0), p_units="dbar",
          p=(1.0, 2.0), s_units="1", s=(35.0, 35.1), s_std="sea_water_practical_salinity",
          z_std="sea_water_pressure") -> Path:
    path = tmp_path / "tiny.nc"
    with netCDF4.Dataset(path, "w") as nc:
        nc.featureType = "profile"
        nc.createDimension("obs", 2)
        for name, std, units, vals in (("p", z_std, p_units, p), ("t", "sea_water_temperature",
                                        t_units, t), ("s", s_std, s_units, s)):
            v = nc.createVariable(name, "f8", ("obs",))
            v.standard_name = std
            v.units = units
            v[:] = vals
    return path


def test_single_profile_without_instance_dimension(tmp_path):
    b = read_netcdf(_tiny(tmp_path))
    assert b.n_profiles == 1 and b.pressure.tolist() == [1.0, 2.0]


@pytest.mark.parametrize(
    ("kwargs", "expect"),
    [
        ({"t_units": "K", "t": (283.15, 284.15)}, ("temperature", [10.0, 11.0])),
        ({"p_units": "Pa", "p": (10000.0, 20000.0)}, ("pressure", [1.0, 2.0])),
        ({"p_units": "bar", "p": (0.1, 0.2)}, ("pressure", [1.0, 2.0])),
    ],
)
def test_labelled_units_converted(tmp_path, kwargs, expect):
    b = read_netcdf(_tiny(tmp_path, **kwargs))
    np.testing.assert_allclose(b.values(expect[0]), expect[1], rtol=0, atol=1e-9)
    assert b.attrs["notes"]


@pytest.mark.parametrize(
    ("kwargs", "needle"),
    [
        ({"t": (283.0, 284.0)}, "kelvin"),
        ({"t_units": "K"}, "looks like degrees Celsius"),
        ({"p": (1e5, 2e7)}, "pascal"),
        ({"p_units": "m"}, "a depth"),
        ({"s_units": "S m-1", "s": (4.2, 4.3)}, "conductivity"),
        ({"s_std": "sea_water_electrical_conductivity"}, None),
        ({"t_units": "furlongs"}, "unknown units"),
    ],
)
def test_plainly_wrong_units_refused(tmp_path, kwargs, needle):
    path = _tiny(tmp_path, **kwargs)
    if needle is None:  # conductivity is not found as salinity at all
        with pytest.raises(InputFileError, match="no salinity variable"):
            read_netcdf(path)
        return
    with pytest.raises(UnitsError, match=needle) as err:
        read_netcdf(path)
    assert str(path) in str(err.value)


def test_depth_variable_converted_with_gsw(tmp_path):
    import gsw

    path = _tiny(tmp_path, z_std="depth", p_units="m", p=(100.0, 2000.0))
    b = read_netcdf(path)  # no latitude: p_from_z with NaN latitude gives NaN
    assert np.isnan(b.pressure).all()
    with netCDF4.Dataset(path, "a") as nc:
        v = nc.createVariable("lat", "f8", ())
        v.standard_name = "latitude"
        v[...] = 30.0
    b = read_netcdf(path)
    # reference: TEOS-10 gsw.p_from_z(z=-depth, lat)
    np.testing.assert_allclose(b.pressure, gsw.p_from_z(-np.array([100.0, 2000.0]), 30.0),
                               rtol=1e-12)


def test_from_decoded_dataset_matches_raw():
    with xr.open_dataset(DATA / "layout_incomplete.nc") as ds:
        decoded = from_dataset(ds.load(), source="mem")
    raw = read_netcdf(DATA / "layout_incomplete.nc")
    for v in ("pressure", "temperature", "salinity"):
        np.testing.assert_array_equal(decoded.values(v), raw.values(v))
        np.testing.assert_array_equal(decoded.flags[v], raw.flags[v])
    assert decoded.profiles["time"].tolist() == raw.profiles["time"].tolist()


@pytest.mark.parametrize("content", [b"profile_id,cruise\n1,2\n", b"\x00\x01garbage" * 10])
def test_not_netcdf(tmp_path, content):
    p = tmp_path / "x.nc"
    p.write_bytes(content)
    with pytest.raises(InputFileError, match="not a NetCDF file"):
        read_netcdf(p)


def test_truncated_netcdf(tmp_path):
    src = (DATA / "layout_contiguous.nc").read_bytes()
    p = tmp_path / "t.nc"
    p.write_bytes(src[: len(src) // 2])
    with pytest.raises(InputFileError, match="truncated or corrupt") as err:
        read_netcdf(p)
    assert "\n" not in str(err.value)


def test_file_with_no_levels(tmp_path):
    path = _tiny(tmp_path, p=(np.nan, np.nan), t=(np.nan, np.nan), s=(np.nan, np.nan))
    with pytest.raises(InputFileError, match="no levels"):
        read_netcdf(path)


def test_empty_profiles_dropped(tmp_path):
    b = read_csv(CANONICAL)
    ds = to_dataset(b, history=HIST)
    rs = ds["row_size"].values.copy()
    ds2 = ds.isel(profile=[0, 1, 2, 0])
    rs = np.append(rs, 0)
    ds2["row_size"] = ("profile", rs, ds["row_size"].attrs)
    out = from_dataset(ds2, source="mem")
    assert out.n_profiles == 3 and out.attrs["dropped_profiles"] == 1


# ------------------------------------------- direct netCDF4 reader/writer vs xarray's
def _odd_batch():
    """A simulated batch whose profile and level columns cover every dtype the writer sees."""
    import pandas as pd

    from qcflag import ProfileBatch
    from qcflag.simulate import SimulationConfig, simulate_archive

    b = simulate_archive(2, seed=5, config=SimulationConfig(
        casts_per_cruise=2, floats_per_cruise=0, max_cast_pressure=200.0))
    rng = np.random.default_rng(1)
    prof = b.profiles.copy()
    n = len(prof)
    prof.loc[1, "time"] = pd.NaT
    prof["ival"] = pd.array([1, None, *range(n - 2)], dtype="Int64")
    prof["fval"] = rng.normal(size=n)
    prof.loc[0, "fval"] = np.nan
    prof["bval"] = rng.random(n) < 0.5
    prof["uval"] = ["ünï", None] + ["x" * k for k in range(n - 2)]
    prof["bad name!"] = np.arange(n)
    extra = b.extra.drop(columns=[c for c in b.extra.columns if c.startswith("truth_time")])
    extra["lev_text"] = np.where(rng.random(b.n_levels) < 0.3, "é;x", None)
    extra["lev_int"] = np.arange(b.n_levels)
    extra["lev_float"] = rng.normal(size=b.n_levels)
    extra["lev_i64na"] = pd.array(np.where(rng.random(b.n_levels) < 0.1, None, 3),
                                  dtype="Int64")
    prof = prof.drop(columns=[c for c in prof.columns if c == "truth_time"])
    return ProfileBatch(offsets=b.offsets, pressure=b.pressure, temperature=b.temperature,
                        salinity=b.salinity, profiles=prof, flags=b.flags, scheme=b.scheme,
                        extra=extra, attrs=b.attrs)


def _same_content(a, b):
    """Two NetCDF files hold the same dataset: decoded, raw, attributes and encodings."""
    for kw in ({}, {"decode_cf": False, "mask_and_scale": False}):
        with xr.open_dataset(a, **kw) as da, xr.open_dataset(b, **kw) as db:
            da.load()
            db.load()
            xr.testing.assert_identical(da, db)  # values, dtypes, dims, attrs, var order
            assert list(da.variables) == list(db.variables)
            for name in da.variables:
                ea, eb = ({k: v for k, v in d[name].encoding.items() if k != "source"}
                          for d in (da, db))
                np.testing.assert_equal(ea, eb, err_msg=name)  # NaN fill == NaN fill
    with netCDF4.Dataset(a) as na, netCDF4.Dataset(b) as nb:  # independent reader
        assert na.data_model == nb.data_model == "NETCDF4"
        assert {d: len(x) for d, x in na.dimensions.items()} == {
            d: len(x) for d, x in nb.dimensions.items()}
        for name, va in na.variables.items():
            vb = nb.variables[name]
            assert va.dtype == vb.dtype and va.dimensions == vb.dimensions, name
            assert va.filters() == vb.filters() and va.chunking() == vb.chunking(), name
            np.testing.assert_equal({k: va.getncattr(k) for k in va.ncattrs()},
                                    {k: vb.getncattr(k) for k in vb.ncattrs()}, err_msg=name)


def test_direct_writer_same_content_as_xarray(tmp_path, monkeypatch):
    """write_netcdf issues netCDF4 calls itself; its file must hold what xarray's to_netcdf
    writes (not byte for byte: it defines all variables before writing any data), and the
    same batch must always give the same bytes."""
    from qcflag.io import netcdf
    from qcflag.pipeline import flag_batch, flagged_columns

    b = _odd_batch()
    added = flagged_columns(b, flag_batch(b))
    cases = [(b, None), (b, added), (read_csv(CANONICAL), None), (b.select([0]), None)]
    for i, (batch, add) in enumerate(cases):
        specs, _ = netcdf._output_variables(batch, add, HIST)
        assert netcdf._direct_plan(specs) is not None  # the direct path is the one tested
        direct = write_netcdf(batch, tmp_path / f"d{i}.nc", added=add, history=HIST)
        to_dataset(batch, added=add, history=HIST).to_netcdf(
            tmp_path / f"x{i}.nc", engine="netcdf4", format="NETCDF4")
        _same_content(direct, tmp_path / f"x{i}.nc")
        again = write_netcdf(batch, tmp_path / f"again{i}.nc", added=add, history=HIST)
        assert direct.read_bytes() == again.read_bytes(), i  # deterministic
    # a column the direct writer does not handle (datetime without units) goes to xarray
    batch = b.select([0, 1])
    prof = batch.profiles.copy()
    prof["when"] = prof["time"]
    from qcflag import ProfileBatch

    odd = ProfileBatch(offsets=batch.offsets, pressure=batch.pressure,
                       temperature=batch.temperature, salinity=batch.salinity, profiles=prof,
                       flags=batch.flags, scheme=batch.scheme, extra=batch.extra)
    assert netcdf._direct_plan(netcdf._output_variables(odd, None, HIST)[0]) is None
    a = write_netcdf(odd, tmp_path / "odd.nc", history=HIST)
    to_dataset(odd, history=HIST).to_netcdf(tmp_path / "oddx.nc", engine="netcdf4")
    assert a.read_bytes() == (tmp_path / "oddx.nc").read_bytes()


def test_same_content_check_sees_a_changed_file(tmp_path):
    """_same_content must fail on a changed value, attribute or fill value."""
    b = read_csv(CANONICAL)
    ref = write_netcdf(b, tmp_path / "ref.nc", history=HIST)
    edits = {
        "value": lambda nc: nc["temperature"].__setitem__(0, 99.0),
        "attribute": lambda nc: nc["temperature"].setncattr("units", "K"),
        "global": lambda nc: nc.setncattr("title", "changed"),
    }
    for what, edit in edits.items():
        p = tmp_path / f"{what}.nc"
        p.write_bytes(ref.read_bytes())
        with netCDF4.Dataset(p, "a") as nc:
            edit(nc)
        with pytest.raises(AssertionError):
            _same_content(ref, p)
    fill = tmp_path / "fill.nc"  # same values and attributes, another _FillValue encoding
    ds = to_dataset(b, history=HIST)
    ds["salinity"].encoding["_FillValue"] = -999.0
    ds.to_netcdf(fill, engine="netcdf4", format="NETCDF4")
    with pytest.raises(AssertionError):
        _same_content(ref, fill)


def _same_batch(a, b):
    import pandas as pd

    np.testing.assert_array_equal(a.offsets, b.offsets)
    for v in ("pressure", "temperature", "salinity"):
        np.testing.assert_array_equal(a.values(v), b.values(v))
    assert a.flags.keys() == b.flags.keys()
    for k in a.flags:
        np.testing.assert_array_equal(a.flags[k], b.flags[k])
    pd.testing.assert_frame_equal(a.profiles, b.profiles)
    if a.extra is None:
        assert b.extra is None
    else:
        pd.testing.assert_frame_equal(a.extra, b.extra)
    assert a.attrs == b.attrs and a.scheme == b.scheme


def test_direct_reader_equals_xarray_reader(tmp_path, monkeypatch):
    """read_netcdf reads contiguous ragged files with netCDF4; xarray must give the same batch."""
    from qcflag.io import netcdf
    from qcflag.pipeline import flag_batch, flagged_columns

    b = _odd_batch()
    paths = [write_netcdf(b, tmp_path / "odd.nc", history=HIST),
             write_netcdf(b, tmp_path / "flagged.nc", history=HIST,
                          added=flagged_columns(b, flag_batch(b))),
             *sorted(DATA.glob("layout_*.nc")), DATA / "argo_synthetic.nc"]
    direct = {p: read_netcdf(p) for p in paths}
    taken = [p for p in paths if netcdf._open_raw(p) is not None]
    assert {p.name for p in taken} == {"odd.nc", "flagged.nc", "layout_contiguous.nc"}
    monkeypatch.setattr(netcdf, "_open_raw", lambda path: None)  # xarray only
    for p in paths:
        _same_batch(direct[p], read_netcdf(p))


def test_direct_reader_errors_are_xarrays(tmp_path):
    """A bad contiguous ragged file still gives the one-line error naming the variable."""
    b = read_csv(CANONICAL)
    p = write_netcdf(b, tmp_path / "a.nc", history=HIST)
    with netCDF4.Dataset(p, "a") as nc:
        nc["row_size"][0] = 10_000  # more levels than the sample dimension holds
    with pytest.raises(InputFileError, match=r"row_size.*sums to"):
        read_netcdf(p)


def test_whole_variable_get_and_put_equal_netcdf4_indexing(tmp_path):
    """_read_whole / _write_whole call netCDF4's _get/_put; they must equal var[...]."""
    from qcflag.io import netcdf

    rng = np.random.default_rng(3)
    data = {
        "f8": ("f8", ("n",), rng.normal(size=7)),
        "big": (">i4", ("n",), np.arange(7, dtype=">i4") - 3),  # stored big-endian
        "i1": ("i1", ("n",), np.array([1, -128, 4, 9, 0, 1, 2], dtype=np.int8)),
        "grid": ("f4", ("m", "n"), rng.normal(size=(2, 7)).astype(np.float32)),
        "cast": ("f4", ("n",), rng.normal(size=7)),  # float64 data into a float variable
        "strided": ("i8", ("n",), np.arange(14, dtype=np.int64)[::2]),
        "chars": ("S1", ("m", "k"), np.array([[b"a", b"b", b""], [b"c", b"", b""]])),
        "text": (str, ("m",), np.array(["é x", ""], dtype=object)),
        "empty": ("f8", ("u",), np.zeros(0)),
        "scalar": ("i8", (), np.array(5, dtype=np.int64)),
    }
    paths = {}
    for how in ("setitem", "direct"):
        p = paths[how] = tmp_path / f"{how}.nc"
        with netCDF4.Dataset(p, "w", format="NETCDF4") as nc:
            for d, n in (("n", 7), ("m", 2), ("k", 3), ("u", None)):
                nc.createDimension(d, n)
            for name, (dt, dims, vals) in data.items():
                var = nc.createVariable(name, dt, dims,
                                        endian="big" if name == "big" else "native")
                var.set_auto_maskandscale(False)
                var.set_auto_chartostring(False)
                if how == "setitem":
                    var[...] = vals
                else:
                    netcdf._write_whole(var, vals)
    assert paths["setitem"].read_bytes() == paths["direct"].read_bytes()
    with netCDF4.Dataset(paths["direct"]) as nc:
        for name, (_, _, vals) in data.items():
            var = nc[name]
            var.set_auto_maskandscale(False)
            var.set_auto_chartostring(False)
            want = var[...]
            got = netcdf._read_whole(var, tuple(int(n) for n in var.shape))
            assert type(got) is type(want) and got.dtype == want.dtype, name
            np.testing.assert_array_equal(got, want)
            np.testing.assert_array_equal(np.asarray(got), np.asarray(vals).astype(want.dtype))


def _xarray_times(raw, attrs):
    import warnings

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        dec = xr.decode_cf(xr.Dataset({"t": (("n",), raw, attrs)}))["t"].values
    return dec.astype("datetime64[ns]")


_I64_MIN = np.iinfo(np.int64).min


@pytest.mark.parametrize(("raw", "attrs"), [
    # what write_netcdf writes: int64 at the batch's resolution, int64 min as the fill
    (np.array([1_700_000_000_123_456_789, _I64_MIN, 0, -5], dtype=np.int64),
     {"units": "nanoseconds since 1970-01-01", "calendar": "standard",
      "_FillValue": np.int64(_I64_MIN)}),
    (np.array([1_700_000_000, _I64_MIN, -86_400], dtype=np.int64),
     {"units": "seconds since 1970-01-01 00:00:00", "calendar": "standard"}),
    (np.array([1, 2, 3], dtype=np.int64), {"units": "microseconds since 1970-01-01"}),
    (np.array([1, 2, -999], dtype=np.int32),
     {"units": "milliseconds since 2000-06-30T12:00:00Z", "missing_value": np.int32(-999)}),
    (np.array([0, 1, 65535], dtype=np.uint16),
     {"units": "Hours since 1990-01-01", "_FillValue": np.uint16(65535)}),
    (np.array([0, 1, 3, -2], dtype=np.int8), {"units": "minute since 2020-02-29 23:59:59"}),
    (np.array([27_000, -30, 0], dtype=np.int16), {"units": "day since 1900-01-01",
                                                 "_FillValue": np.int16(0),
                                                 "calendar": "gregorian"}),
    # floats: days since 1950 (common in ocean data), fractions, NaN and a fill value
    (np.array([25_000.5, np.nan, 1e5 / 3, -0.123456789, 27_123.987654321, -99_999.0]),
     {"units": "days since 1950-01-01 00:00:00", "_FillValue": -99_999.0,
      "calendar": "proleptic_gregorian"}),
    (np.array([0.1, 0.7, 1e9 + 0.3], dtype=np.float32),
     {"units": "seconds since 1970-01-01T00:00:00.0", "missing_value": np.float32(0.7)}),
    (np.array([1.5e9, 2e9, 1.0, np.nan]), {"units": "seconds since 1970-01-01",
                                           "_FillValue": np.nan}),
    (np.array([np.nan, np.nan]), {"units": "hours since 2001-01-01"}),
    # sub-nanosecond fractions: truncated towards zero, not rounded
    (np.array([1.0000000007, -1.7e-9, 2.5e-9, 3.9e-9]), {"units": "seconds since 1970-01-01"}),
    (np.array([106_000.0, 106_500.25]), {"units": "days since 1800-01-01"}),
])
def test_numpy_time_decoder_equals_xarray(raw, attrs):
    """_times decodes the common CF time units in numpy; values (incl. NaT) as xarray's."""
    from qcflag.io import netcdf

    fast = netcdf._cf_times_numpy(raw, attrs)
    assert fast is not None and fast.dtype == np.dtype("datetime64[ns]")
    np.testing.assert_array_equal(fast, _xarray_times(raw, attrs))
    assert np.isnat(fast).sum() == np.isnat(_xarray_times(raw, attrs)).sum()


@pytest.mark.parametrize(("raw", "attrs"), [
    (np.array([1, 2]), {"units": "days since 1950-01-01", "calendar": "noleap"}),
    (np.array([1, 2]), {"units": "months since 1950-01-01"}),
    (np.array([1, 2]), {"units": "days since 1-1-1"}),
    (np.array([1, 2]), {"units": "days since 1950-01-01 00:00:00 +02:00"}),
    (np.array([1, 2]), {"units": "days since 1500-01-01"}),  # before datetime64[ns]
    (np.array([1, 200_000]), {"units": "days since 1950-01-01"}),  # after 2262
    (np.array([1.0, 2e17]), {"units": "days since 1950-01-01"}),
    (np.array([1, 2]), {"units": "days since 1950-01-01", "scale_factor": 2.0}),
    (np.array([np.iinfo(np.uint64).max], dtype=np.uint64), {"units": "ns since 1970-01-01"}),
    (np.zeros(0, dtype=np.int64), {"units": "days since 1950-01-01"}),
])
def test_numpy_time_decoder_leaves_the_rest_to_xarray(raw, attrs):
    """Other calendars, units, references and out-of-range values go through xarray."""
    from qcflag.io import netcdf

    assert netcdf._cf_times_numpy(raw, attrs) is None


def test_times_through_xarray_still_decode():
    """A file whose times the numpy decoder declines (hours since 1-1-1) reads as before."""
    from qcflag.io import netcdf

    attrs = {"units": "hours since 0001-01-01", "calendar": "proleptic_gregorian"}
    var = netcdf._RawVariable("time", ("profile",), attrs, {},
                              np.array([24.0 * 738_000, 24.0 * 738_001]))
    assert netcdf._cf_times_numpy(var.values, var.attrs) is None
    got = netcdf._times(var, "x.nc")
    np.testing.assert_array_equal(got, _xarray_times(var.values, var.attrs))
    assert got[0] == np.datetime64("2021-07-30T00:00:00", "ns")


def test_profile_table_round_trip_keeps_order_and_dtypes(tmp_path):
    """Carried-over profile columns come back in order with their dtypes (one frame built)."""
    import pandas as pd

    b = _odd_batch()
    got = read_netcdf(write_netcdf(b, tmp_path / "o.nc", history=HIST)).profiles
    want = b.profiles.copy()
    want["bval"] = want["bval"].astype(np.int8)  # booleans are written as 8-bit integers
    want["uval"] = want["uval"].fillna("")  # missing text is written as ""
    assert list(got.columns) == list(want.columns)
    pd.testing.assert_frame_equal(got, want)


def test_carried_integer_variables_keep_their_type(tmp_path):
    """An int8 / uint16 / int32 variable carried through flagging is written back as stored.

    (Before, every carried integer came back as int64: eight times the bytes of an int8
    mistake marker, and not the type the data manager wrote.)
    """
    b = _odd_batch()
    rng = np.random.default_rng(4)
    b.extra["lev_i8"] = rng.integers(-5, 5, b.n_levels).astype(np.int8)
    b.extra["lev_u16"] = rng.integers(0, 60_000, b.n_levels).astype(np.uint16)
    b.profiles["p_i32"] = np.arange(len(b.profiles), dtype=np.int32)
    first = write_netcdf(b, tmp_path / "a.nc", history=HIST)
    got = read_netcdf(first)
    for col, dt in (("lev_i8", np.int8), ("lev_u16", np.uint16)):
        assert got.extra[col].dtype == dt
        np.testing.assert_array_equal(got.extra[col].to_numpy(), b.extra[col].to_numpy())
    assert got.profiles["p_i32"].dtype == np.int32
    again = write_netcdf(got, tmp_path / "b.nc", history=HIST)  # and once more: unchanged
    with netCDF4.Dataset(first) as d1, netCDF4.Dataset(again) as d2:
        for name in ("lev_i8", "lev_u16", "p_i32"):
            assert d1[name].dtype == np.dtype(
                {"lev_i8": np.int8, "lev_u16": np.uint16, "p_i32": np.int32}[name])
            assert d2[name].dtype == d1[name].dtype


def test_per_level_text_reads_as_categories_and_writes_the_same(tmp_path):
    """Per-level text comes back as categories with the stored values, and writing the
    categorical column gives the same file as writing the same text as plain strings."""
    import pandas as pd

    b = _odd_batch()
    rng = np.random.default_rng(9)
    words = np.array(["", "spike", "stuck ", "ünï"], dtype=object)  # trailing blank stripped
    b.extra["lev_words"] = words[rng.integers(0, 4, b.n_levels)]
    got = read_netcdf(write_netcdf(b, tmp_path / "a.nc", history=HIST))
    col = got.extra["lev_words"]
    assert isinstance(col.dtype, pd.CategoricalDtype)
    assert col.cat.categories.is_unique
    want = [w.strip() for w in b.extra["lev_words"]]
    assert col.astype(object).tolist() == want
    assert got.extra["lev_text"].astype(object).tolist() == [
        "" if pd.isna(v) else v for v in b.extra["lev_text"]]
    plain = got.select(np.arange(got.n_profiles))
    plain.extra["lev_words"] = col.astype(object).to_numpy()
    plain.extra["lev_text"] = got.extra["lev_text"].astype(object).to_numpy()
    _same_content(write_netcdf(got, tmp_path / "cat.nc", history=HIST),
                  write_netcdf(plain, tmp_path / "obj.nc", history=HIST))
