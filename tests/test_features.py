"""Feature matrix: columns, boundaries, and values against numpy/pandas references."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from qcflag.features import FEATURE_SET_VERSION, build_features, window_robust_z
from qcflag.profiles import ProfileBatch
from qcflag.rules import run_checks


def _batch(counts=(12, 1, 9), seed=0, instrument=("ctd", "float", None)):
    rng = np.random.default_rng(seed)
    n = sum(counts)
    offsets = np.concatenate([[0], np.cumsum(counts)])
    p = np.concatenate([np.arange(c) * 2.0 + 1.0 for c in counts])  # uniform 2 dbar
    t = 15 - 0.01 * p + rng.normal(0, 0.02, n)
    s = 35 + 0.001 * p + rng.normal(0, 0.005, n)
    t[5] += 3.0  # a spike
    prof = pd.DataFrame({
        "profile_id": [f"P{i}" for i in range(len(counts))],
        "cruise": ["A", "A", "B"],
        "time": pd.to_datetime(["2020-01-01", "2020-01-02", "2020-02-01"]),
        "latitude": [45.0, 45.1, 44.0], "longitude": [-10.0, -10.2, -12.0],
        "platform": ["x", "y", "z"], "instrument": list(instrument),
    })
    return ProfileBatch(offsets=offsets, pressure=p, temperature=t, salinity=s, profiles=prof)


@pytest.fixture(scope="module")
def batch():
    return _batch()


@pytest.fixture(scope="module")
def feats(batch):
    checks = run_checks(batch)
    return {v: build_features(batch, checks, v) for v in ("temperature", "salinity")}, checks


def test_columns_are_stable_and_include_every_check_statistic(feats):
    (out, checks) = feats
    X, names = out["temperature"]
    assert X.dtype == np.float64 and X.shape[1] == len(names) == len(set(names))
    stats = sorted(checks.statistics())
    assert names[: len(stats)] == stats  # all statistics, sorted by name
    assert names[-1] == "rule_grade"
    for col in ("pressure", "log_pressure", "relative_position", "dT_dp", "dS_dp",
                "profile_n_levels", "profile_max_abs_z", "instrument_ctd", "instrument_float"):
        assert col in names
    assert isinstance(FEATURE_SET_VERSION, int)


def test_derivatives_match_numpy_gradient_inside_profiles(batch, feats):
    (out, _) = feats
    X, names = out["temperature"]
    d = X[:, names.index("dT_dp")]
    for i in range(batch.n_profiles):
        sl = slice(batch.offsets[i], batch.offsets[i + 1])
        if batch.counts[i] < 3:
            assert np.isnan(d[sl]).all()
            continue
        # numpy's central difference on uniform spacing (reference implementation)
        ref = np.gradient(batch.temperature[sl], batch.pressure[sl])
        np.testing.assert_allclose(d[sl][1:-1], ref[1:-1], rtol=1e-12)
        assert np.isnan(d[sl][0]) and np.isnan(d[sl][-1])  # masked at profile boundaries


def test_window_robust_z_matches_pandas_rolling_median(batch):
    z = window_robust_z(batch, batch.temperature)
    for i in range(batch.n_profiles):
        sl = slice(batch.offsets[i], batch.offsets[i + 1])
        x = pd.Series(batch.temperature[sl])
        med = x.rolling(7, center=True, min_periods=1).median()
        dev = [np.median(np.abs(x.iloc[max(0, j - 3): j + 4] - med.iloc[j]))
               for j in range(len(x))]
        ref = (x - med) / (1.4826 * np.maximum(dev, 0.005))
        cnt = x.rolling(7, center=True, min_periods=1).count()
        ref[cnt < 3] = np.nan
        np.testing.assert_allclose(z[sl], ref.to_numpy(), rtol=1e-12)
    assert abs(z[5]) > 10  # the spike stands out


def test_context_columns(batch, feats):
    (out, _) = feats
    X, names = out["salinity"]
    col = {n: X[:, names.index(n)] for n in names}
    np.testing.assert_array_equal(col["profile_n_levels"], np.repeat([12, 1, 9], [12, 1, 9]))
    assert col["relative_position"][0] == 0 and col["relative_position"][11] == 1
    assert col["relative_position"][12] == 0.5  # single-level profile
    np.testing.assert_array_equal(col["instrument_ctd"][:12], 1)
    np.testing.assert_array_equal(col["instrument_float"][12], 1)
    assert np.isnan(col["instrument_ctd"][13:]).all()  # unknown instrument
    assert set(np.unique(col["rule_grade"])) <= {1, 3, 4}


def test_bad_variable_is_refused(batch, feats):
    with pytest.raises(ValueError, match="variable"):
        build_features(batch, feats[1], "pressure")
