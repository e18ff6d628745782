"""Property-based tests (hypothesis) over the batch, the readers and the checks.

Strategies come from :mod:`qcflag.testing` (invented data). Valid inputs must always read and
check without error, with results of the right shape and dtype; invalid inputs must raise a
QCFlagError with a one-line message, never any other exception.
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from qcflag import ProfileBatch, QCFlagError
from qcflag.checks.registry import available_checks
from qcflag.exceptions import InvalidProfileError
from qcflag.io import read_file
from qcflag.rules import BUILTIN_RULE_SETS, run_checks
from qcflag.testing import (
    invalid_batch_arguments,
    invalid_csv_texts,
    synthetic_profile,
    valid_batches,
    valid_csv_texts,
)

FAST = settings(max_examples=25, deadline=None,
                suppress_health_check=[HealthCheck.function_scoped_fixture,
                                       HealthCheck.too_slow])


def _assert_check_table(table, n_levels):
    assert table.results, "a rule set ran no check"
    for (name, var), res in table.results.items():
        assert res.statistic.shape == (n_levels,), (name, var)
        assert res.statistic.dtype == np.float64, (name, var)
        assert res.grade.shape == (n_levels,), (name, var)
        assert res.grade.dtype == np.int8, (name, var)
        # data conventions: 0 not applicable, 1 pass, 3 probably bad, 4 bad
        assert set(np.unique(res.grade).tolist()) <= {0, 1, 3, 4}, (name, var)


@FAST
@given(batch=valid_batches(), rules=st.sampled_from(sorted(BUILTIN_RULE_SETS)))
def test_valid_batches_check_without_error(batch, rules):
    table = run_checks(batch, rules)
    _assert_check_table(table, batch.n_levels)
    for var in ("temperature", "salinity"):
        verdict = table.verdict(var)
        assert verdict.shape == (batch.n_levels,)
        assert set(np.unique(verdict).tolist()) <= {0, 1, 3, 4}


TRACK_CHECKS = {"impossible_speed"}
"""Checks that compare a profile with the other fixes of its track (same cruise)."""


def _assert_same_slice(whole, part, rows, skip=()):
    for key, res in part.results.items():
        if key[0] in skip:
            continue
        np.testing.assert_array_equal(whole.results[key].grade[rows], res.grade, str(key))
        np.testing.assert_array_equal(whole.results[key].statistic[rows], res.statistic,
                                      str(key))


@FAST
@given(batch=valid_batches(max_profiles=3, max_levels=6))
def test_batch_result_equals_profile_by_profile(batch):
    # vectorised over the ragged batch = each profile on its own (boundaries are masked),
    # for every check that looks at one profile
    whole = run_checks(batch)
    for i in range(batch.n_profiles):
        one = run_checks(batch.select([i]))
        sl = np.arange(batch.offsets[i], batch.offsets[i + 1])
        _assert_same_slice(whole, one, sl, skip=TRACK_CHECKS)


@FAST
@given(batch=valid_batches(max_profiles=4, max_levels=6))
def test_batch_result_equals_cruise_by_cruise(batch):
    # every check, track checks included: each cruise on its own gives the same results
    whole = run_checks(batch)
    cruise = batch.profiles["cruise"].astype(str).to_numpy()
    for c in dict.fromkeys(cruise):
        idx = np.flatnonzero(cruise == c)
        part = run_checks(batch.select(idx))
        rows = np.concatenate([np.arange(batch.offsets[i], batch.offsets[i + 1]) for i in idx])
        _assert_same_slice(whole, part, rows)


@FAST
@given(kwargs=invalid_batch_arguments())
def test_invalid_batch_arguments_raise_invalid_profile_error(kwargs):
    with pytest.raises(InvalidProfileError) as err:
        ProfileBatch(**kwargs)
    assert str(err.value) and "\n" not in str(err.value)


@FAST
@given(text=valid_csv_texts())
def test_valid_csv_reads(tmp_path_factory, text):
    p = tmp_path_factory.mktemp("v") / "valid.csv"
    p.write_text(text)
    n_rows = len(text.splitlines()) - 1
    batch = read_file(p)
    assert batch.n_levels == n_rows
    for v in ("pressure", "temperature", "salinity"):
        assert batch.values(v).dtype == np.float64 and batch.values(v).shape == (n_rows,)
    assert batch.counts.sum() == n_rows and (batch.counts >= 1).all()
    _assert_check_table(run_checks(batch), n_rows)


@FAST
@given(case=invalid_csv_texts())
def test_invalid_csv_raises_qcflag_error_naming_file(tmp_path_factory, case):
    text, needle = case
    p = tmp_path_factory.mktemp("i") / "invalid.csv"
    p.write_text(text)
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # a warning is not an answer to bad input
        with pytest.raises(QCFlagError) as err:
            read_file(p)
    msg = str(err.value)
    assert str(p) in msg and needle in msg and "\n" not in msg


@FAST
@given(n=st.integers(1, 300), noise=st.sampled_from([0.001, 0.002]), seed=st.integers(0, 9))
def test_synthetic_profile_passes_the_standard_rules(n, noise, seed):
    # the invented cast (2 dbar bins, CTD-like noise) is smooth, stable and in range: no
    # rule may call it bad (exactly constant values would rightly trip the flat-line check)
    b = synthetic_profile(n, max_pressure=2.0 * n, noise=noise, seed=seed)
    table = run_checks(b)
    _assert_check_table(table, n)
    fired = sorted(k for k, r in table.results.items() if (r.grade >= 3).any())
    assert not fired, fired


def test_every_registered_check_is_exercised_by_a_rule_set():
    # guards the property tests above: they only cover checks that the shipped rules run
    ran = set()
    b = synthetic_profile(20)
    for rules in BUILTIN_RULE_SETS:
        ran |= {name for name, _ in run_checks(b, rules).results}
    missing = set(available_checks()) - ran
    assert len(missing) <= len(available_checks()) // 2, sorted(missing)
