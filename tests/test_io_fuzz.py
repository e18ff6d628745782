"""Bounded fuzz of the readers: random byte mutations and truncations of valid files.

Every mutated file must either read as a valid ProfileBatch or raise a QCFlagError (which
the CLI prints as one line); any other exception is a bug. The seeds are fixed, so a failure
is reproducible; a few hundred cases run in a few seconds.
"""

from __future__ import annotations

import warnings
from pathlib import Path

import numpy as np
import pytest

from qcflag import ProfileBatch, QCFlagError
from qcflag.io import read_file

DATA = Path(__file__).resolve().parent / "data"


def _mutants(src: bytes, rng: np.random.Generator, n: int, *, protect: int = 0):
    for _ in range(n):
        b = bytearray(src)
        kind = rng.integers(4)
        if kind == 0:  # truncate
            yield bytes(b[: int(rng.integers(0, len(b)))])
            continue
        k = int(rng.integers(1, 8))
        for _ in range(k):
            i = int(rng.integers(protect, len(b)))
            if kind == 1:
                b[i] = int(rng.integers(256))
            elif kind == 2:
                b[i] = rng.choice(list(b",\n\"-.0123456789eE ;\x00"))
            else:
                del b[i]
        yield bytes(b)


def _check(path: Path) -> None:
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            out = read_file(path)
    except QCFlagError as exc:
        assert str(exc) and "\n" not in str(exc), repr(exc)
    else:
        assert isinstance(out, ProfileBatch)


@pytest.mark.parametrize(("name", "suffix", "n"), [("canonical.csv", ".csv", 250),
                                                   ("argo_synthetic.nc", ".nc", 150)])
def test_fuzz_reader(tmp_path, name, suffix, n):
    src = (DATA / name).read_bytes()
    rng = np.random.default_rng(20240114)
    for i, data in enumerate(_mutants(src, rng, n)):
        p = tmp_path / f"m{i}{suffix}"
        p.write_bytes(data)
        _check(p)
        p.unlink()


def test_fuzz_netcdf4_truncations(tmp_path):
    # HDF5-based files: truncations only (random bytes inside HDF5 metadata can make the
    # HDF5 library itself misbehave, which no reader can guard against)
    src = (DATA / "layout_contiguous.nc").read_bytes()
    rng = np.random.default_rng(7)
    for i, cut in enumerate(rng.integers(0, len(src), 40)):
        p = tmp_path / f"t{i}.nc"
        p.write_bytes(src[: int(cut)])
        _check(p)
