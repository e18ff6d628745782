from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from qcflag.combine import DecisionError
from qcflag.pipeline import flag_batch, flagged_columns, profile_grades
from qcflag.profiles import ProfileBatch
from qcflag.result import VariableFlags
from qcflag.schemes import State, decode, get_scheme


def _vflags(grade, state) -> VariableFlags:
    g = np.asarray(grade, dtype=np.int8)
    n = g.size
    return VariableFlags(g, np.asarray(state, dtype=np.int8), np.ones(n),
                         np.full(n, "", dtype=object), g, np.zeros(n, bool))


# --------------------------------------------------------------------- profile grade
def test_profile_grades_match_argo_table_2a_examples():
    # Argo User's Manual reference table 2a worked example (../shared/reference/
    # qc-standards.md §6 E1): 45 levels flagged 1, 5 flagged 2, 7 flagged 4 and 3 flagged 9
    # give N = 50/57 = 87.7 % -> "B".
    e1_g = [1] * 45 + [2] * 5 + [4] * 7 + [0] * 3
    e1_s = [State.ASSESSED] * 57 + [State.MISSING] * 3
    # E3 (derived there): 1,1,1,3 -> 75 % -> "B"; E4: 1,3,4,4 -> 25 % "D";
    # 1,4,4,4,4 -> 20 % "E"; all 4 -> "F"; all 1/2 -> "A"; E2: all missing -> blank.
    rest = [[1, 1, 1, 3], [1, 3, 4, 4], [1, 4, 4, 4, 4], [4, 4], [1, 2, 2], [0, 0]]
    grades = e1_g + [g for r in rest for g in r]
    states = e1_s + [State.ASSESSED] * (len(grades) - len(e1_g) - 2) + [State.MISSING] * 2
    counts = [60] + [len(r) for r in rest]
    offsets = np.concatenate([[0], np.cumsum(counts)])
    table = profile_grades({"temperature": _vflags(grades, states)}, offsets,
                           [f"p{i}" for i in range(len(counts))])
    assert table["temperature_percent_good"].iloc[0] == pytest.approx(100 * 50 / 57)
    assert round(table["temperature_percent_good"].iloc[0], 1) == 87.7
    assert table["temperature_profile_grade"].tolist() == ["B", "B", "D", "E", "F", "A", " "]
    np.testing.assert_allclose(table["temperature_percent_good"].iloc[1:6], [75, 25, 20, 0, 100])


# ------------------------------------------------------------------ invented batches
def _batch(n_profiles: int = 6, seed: int = 0, faults: bool = True) -> ProfileBatch:
    """Invented north-east Atlantic casts (smooth thermocline) with optional faults."""
    rng = np.random.default_rng(seed)
    counts = rng.integers(20, 60, size=n_profiles)
    offsets = np.concatenate([[0], np.cumsum(counts)])
    p = np.concatenate([np.arange(c) * 20.0 + 5.0 for c in counts])
    t = 4.0 + 10.0 * np.exp(-p / 300.0) + rng.normal(0, 0.01, p.size)
    s = 35.0 + 0.5 * np.exp(-p / 400.0) + rng.normal(0, 0.002, p.size)
    if faults:  # one fault per profile, cycling through the kinds
        for i in range(n_profiles):
            o = offsets[i]
            kind = i % 4
            if kind == 0:
                t[o + 5] += 8.0  # spike of published size (> 6 degC above 500 dbar)
            elif kind == 1:
                t[o + 3] = 45.0  # outside the global range
            elif kind == 2:
                s[o + 7] = np.nan  # missing value
            else:
                p[o + 4] = p[o + 3]  # duplicate pressure
    prof = pd.DataFrame({
        "profile_id": [f"st{i:03d}" for i in range(n_profiles)],
        "cruise": ["AB01"] * (n_profiles // 2) + ["AB02"] * (n_profiles - n_profiles // 2),
        "time": pd.to_datetime("2021-06-01") + pd.to_timedelta(np.arange(n_profiles), "h"),
        "latitude": 48.0 + 0.1 * np.arange(n_profiles),
        "longitude": np.full(n_profiles, -20.0),
        "platform": ["ship"] * n_profiles,
    })
    return ProfileBatch(offsets=offsets, pressure=p, temperature=t, salinity=s, profiles=prof)


def test_rules_only_flags_forced_missing_and_reasons_name_real_checks():
    from qcflag.checks.registry import CHECKS

    b = _batch()
    r = flag_batch(b)
    t, s = r["temperature"], r["salinity"]
    assert t.proba is None
    gr = b.offsets[1] + 3
    assert t.grade[gr] == 4 and t.forced[gr] and t.confidence[gr] == 1.0
    assert "global_range" in t.reasons[gr].split(";")
    sp = b.offsets[0] + 5
    assert t.grade[sp] == 4 and "spike" in t.reasons[sp].split(";")
    miss = b.offsets[2] + 7
    assert s.state[miss] == State.MISSING and s.grade[miss] == 0
    assert s.codes("argo")[miss] == 9
    assert "pressure" in r.variables
    dup = b.offsets[3] + 4
    assert r["pressure"].grade[dup] == 4 and r["pressure"].forced[dup]
    # every reason token is a check of the registry
    tokens = {tok for vf in r.variables.values() for reason in vf.reasons
              for tok in reason.split(";") if tok}
    assert tokens and tokens <= set(CHECKS)
    # levels without a fired check carry no reason and a rules-only grade of 1
    assert ((t.reasons == "") == (t.rule_grade < 3)).all()
    assert set(r.profiles.columns) >= {"temperature_percent_good", "temperature_profile_grade",
                                       "salinity_profile_grade"}


@settings(max_examples=8, deadline=None)
@given(seed=st.integers(0, 10_000), n=st.integers(2, 7))
def test_flag_batch_equals_flagging_each_cruise(seed, n):
    # checks that compare a fix with its track (impossible speed) need the whole cruise;
    # within that, flagging is per cruise: any split into whole cruises gives the same flags
    b = _batch(n, seed)
    whole = flag_batch(b)
    cruise = b.profiles["cruise"].to_numpy()
    groups = [np.flatnonzero(cruise == c) for c in dict.fromkeys(cruise)]
    parts = [flag_batch(b.select(g)) for g in groups]
    for var, vf in whole.variables.items():
        for attr in ("grade", "state", "confidence", "reasons", "rule_grade", "forced"):
            cat = np.concatenate([getattr(p[var], attr) for p in parts])
            np.testing.assert_array_equal(getattr(vf, attr), cat, err_msg=f"{var}.{attr}")
    pd.testing.assert_frame_equal(
        whole.profiles, pd.concat([p.profiles for p in parts], ignore_index=True))


def test_flagged_columns_cf_attributes():
    b = _batch()
    r = flag_batch(b)
    cols = flagged_columns(b, r, scheme="argo")
    for var in ("temperature", "salinity", "pressure"):
        flag = cols[f"{var}_flag_auto"]
        assert flag.parent == var
        assert flag.attrs["standard_name"] == "aggregate_quality_flag"
        sch = get_scheme("argo")
        assert list(flag.attrs["flag_values"]) == list(sch.values)
        assert len(flag.attrs["flag_meanings"].split()) == len(flag.attrs["flag_values"])
        g, _ = decode(flag.values, "argo")
        np.testing.assert_array_equal(g, r[var].grade)
        assert {f"{var}_flag_auto_confidence", f"{var}_flag_auto_reasons"} <= set(cols)
    assert not any("_proba_" in k for k in cols)  # rules-only: no probabilities
    ioc = flagged_columns(b, r, scheme="ioc")["temperature_flag_auto"]
    assert set(np.unique(ioc.values)) <= {1, 3, 4}


def test_decision_settings_are_checked():
    b = _batch(2)
    with pytest.raises(DecisionError):
        flag_batch(b, target_recall=0.9)  # needs a model
    with pytest.raises(DecisionError):
        flag_batch(b, caution=0.5, review_budget=0.1)


# ------------------------------------------------------------------------------- CLI
def _write_input(tmp_path, suffix=".csv"):
    from qcflag.io import write

    b = _batch(4, seed=3)
    n = b.n_levels
    flags = {"temperature": np.ones(n, np.int8), "salinity": np.ones(n, np.int8)}
    extra = pd.DataFrame({"conductivity_raw": np.linspace(30, 40, n)})
    from dataclasses import replace

    b = replace(b, flags=flags, extra=extra)
    path = tmp_path / f"casts{suffix}"
    write(b, path)
    return path


def test_cli_flag_rules_only_csv_keeps_columns_and_adds_three_per_variable(tmp_path):
    from typer.testing import CliRunner

    from qcflag.cli import app

    src = _write_input(tmp_path)
    before = src.read_bytes()
    out = tmp_path / "out.csv"
    res = CliRunner().invoke(app, ["flag", str(src), "--out", str(out)])
    assert res.exit_code == 0, res.output
    assert src.read_bytes() == before  # input untouched
    inp, got = pd.read_csv(src), pd.read_csv(out)
    assert list(got.columns[: len(inp.columns)]) == list(inp.columns)
    pd.testing.assert_frame_equal(got[inp.columns], inp)  # every input column kept as is
    added = list(got.columns[len(inp.columns):])
    for var in ("temperature", "salinity"):
        assert {f"{var}_flag_auto", f"{var}_flag_auto_confidence",
                f"{var}_flag_auto_reasons"} <= set(added)
    assert len(added) in (6, 9)  # pressure too where checked
    assert set(got["temperature_flag_auto"].unique()) <= {1, 2, 3, 4, 9}
    assert (got["temperature_flag_auto"] == 4).any()
    # no overwrite without --overwrite: exit 1, one line, no traceback
    again = CliRunner().invoke(app, ["flag", str(src), "--out", str(out)])
    assert again.exit_code == 1
    assert "--overwrite" in again.output and "Traceback" not in again.output
    ok = CliRunner().invoke(app, ["flag", str(src), "--out", str(out), "--overwrite",
                                  "--scheme", "ioc"])
    assert ok.exit_code == 0, ok.output
    assert set(pd.read_csv(out)["temperature_flag_auto"].unique()) <= {1, 3, 4, 9}
    bad = CliRunner().invoke(app, ["flag", str(src), "--out", str(tmp_path / "x.csv"),
                                   "--target-recall", "0.9"])
    assert bad.exit_code == 1 and "--model" in bad.output
    bad = CliRunner().invoke(app, ["flag", str(src), "--out", str(tmp_path / "x.csv"),
                                   "--false-alarm-rate", "0.01"])
    assert bad.exit_code == 1 and "--model" in bad.output
    usage = CliRunner().invoke(app, ["flag", str(src)])
    assert usage.exit_code == 2


def test_cli_flag_netcdf_has_cf_flag_variables_and_links(tmp_path):
    import xarray as xr
    from typer.testing import CliRunner

    from qcflag.cli import app

    srcs = [_write_input(tmp_path / d, ".nc") for d in ("a", "b")]
    outdir = tmp_path / "flagged"
    res = CliRunner().invoke(app, ["flag", *map(str, srcs), "--out", str(outdir)])
    assert res.exit_code != 0  # both inputs are named casts.nc: outputs would collide
    assert "collide" in res.output
    res = CliRunner().invoke(app, ["flag", str(srcs[0]), "--out", str(outdir / "o.nc")])
    assert res.exit_code == 0, res.output
    with xr.open_dataset(outdir / "o.nc", decode_cf=False) as ds:
        for var in ("temperature", "salinity"):
            names = [k for k in ds.variables if k.endswith(f"{var}_flag_auto")]
            assert names, list(ds.variables)
            flag = ds[names[0]]
            # CF §3.5 flags; CF §3.4 ancillary_variables (../shared/reference/
            # formats-and-conventions.md §1.1-1.2)
            assert flag.attrs["standard_name"] == "aggregate_quality_flag"
            vals = np.atleast_1d(flag.attrs["flag_values"])
            assert vals.dtype == flag.dtype
            assert len(flag.attrs["flag_meanings"].split()) == vals.size
            parent = [k for k in ds.variables
                      if names[0] in str(ds[k].attrs.get("ancillary_variables", "")).split()]
            assert parent, f"no variable lists {names[0]} in ancillary_variables"
        assert "qcflag" in ds.attrs.get("history", "")
