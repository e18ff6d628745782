"""The fast CSV table writer gives pandas' ``to_csv`` bytes exactly (pandas is the reference)."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from qcflag.io import csv as qcsv

_PANDAS = {"index": False, "lineterminator": "\n", "na_rep": "", "encoding": "utf-8"}


def _same_as_pandas(table: pd.DataFrame, tmp_path) -> bytes:
    want, got = tmp_path / "pandas.csv", tmp_path / "fast.csv"
    table.to_csv(want, **_PANDAS)
    qcsv.write_table(table, got)
    assert got.read_bytes() == want.read_bytes()
    return got.read_bytes()


def _awkward_floats(rng: np.random.Generator, n: int) -> np.ndarray:
    """Random bit patterns (subnormals, huge, tiny, NaN payloads) and the classic edge cases."""
    bits = rng.integers(np.iinfo(np.int64).min, np.iinfo(np.int64).max, n, dtype=np.int64)
    x = bits.view(np.float64).copy()
    edge = [0.0, -0.0, np.inf, -np.inf, np.nan, 5e-324, -5e-324, 1.7976931348623157e308,
            1e16, 1e15, 9999999999999998.0, 1e-5, 1e-4, 0.1, 0.30000000000000004, 5.0, -2.5e-7,
            123456789012345678.0, 2.0**53, 2.0**53 + 2]
    x[:len(edge)] = edge
    return x


def test_awkward_values_of_every_supported_type(tmp_path):
    rng = np.random.default_rng(20261202)
    n = 3000
    words = np.array(["", "a,b", 'say "hi"', "two\nlines", "cr\rhere", " lead", "trail ",
                      "tab\there", "ünïcödé", "#x", "a'b", "-", "nan", "None"], dtype=object)
    text = words[rng.integers(0, words.size, n)]
    text[rng.random(n) < 0.1] = None
    table = pd.DataFrame({
        "f": _awkward_floats(rng, n),
        "repeated": np.repeat(rng.normal(size=n // 100), 100),  # formatted once per value
        "signed_zero": np.where(rng.random(n) < 0.5, 0.0, -0.0),  # only two values
        "i8": rng.integers(-128, 128, n).astype(np.int8),
        "u16": rng.integers(0, 65_536, n).astype(np.uint16),
        "i64": rng.integers(np.iinfo(np.int64).min, np.iinfo(np.int64).max, n),
        "b": rng.random(n) < 0.5,
        "nullable": pd.array(np.where(rng.random(n) < 0.2, None, rng.integers(-9, 9, n)),
                             dtype="Int64"),
        "text": text,
        "text_obj": pd.Series(text, dtype=object),
        "cat": pd.Categorical(text),
        'odd, "name"': 1,
    })
    _same_as_pandas(table, tmp_path)


def test_blocks_join_like_one_write(tmp_path, monkeypatch):
    monkeypatch.setattr(qcsv, "_ROWS_PER_BLOCK", 7)
    rng = np.random.default_rng(3)
    table = pd.DataFrame({"x": rng.normal(size=50), "y": np.arange(50), "z": ["a"] * 50,
                          "c": pd.Categorical(rng.choice(["p,1", "q", None], 50))})
    _same_as_pandas(table, tmp_path)


@pytest.mark.parametrize("column", [
    pd.Series(pd.date_range("2020-01-01", periods=6, freq="h")),  # datetimes
    pd.Series(np.linspace(0, 1, 6, dtype=np.float32)),  # float32 prints its own way
    pd.Series([1, "a", 2.5, None, b"x", "b"], dtype=object),  # not all text
], ids=["datetime", "float32", "mixed-objects"])
def test_unknown_types_go_to_pandas(tmp_path, column):
    _same_as_pandas(pd.DataFrame({"k": np.arange(6), "v": column}), tmp_path)


def test_one_column_and_empty_tables(tmp_path):
    _same_as_pandas(pd.DataFrame({"only": [1.5, np.nan, 2.0]}), tmp_path)  # "" quoted alone
    _same_as_pandas(pd.DataFrame({"a": [], "b": []}), tmp_path)


def test_flagged_batch_as_written_by_write_csv(tmp_path):
    """A simulated, flagged batch through the public writer equals pandas' text."""
    from qcflag.io import write
    from qcflag.io.csv import level_table
    from qcflag.pipeline import flag_batch, flagged_columns
    from qcflag.simulate import simulate_archive

    batch = simulate_archive(2, seed=8)
    added = flagged_columns(batch, flag_batch(batch))
    out = write(batch, tmp_path / "flagged.csv", added=added)
    level_table(batch, added=added).to_csv(tmp_path / "ref.csv", **_PANDAS)
    assert out.read_bytes() == (tmp_path / "ref.csv").read_bytes()
