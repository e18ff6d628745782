"""Helpers for testing code that uses qcflag: synthetic profiles and hypothesis strategies.

:func:`synthetic_profile` builds a smooth, physically plausible invented CTD cast (a
warm mixed layer over a tanh thermocline and a fresher deep layer). The ``*_batches`` and
``*_csv_texts`` functions return `hypothesis <https://hypothesis.readthedocs.io>`_
strategies (hypothesis is a test dependency, imported only when a strategy is asked for):

* :func:`valid_batches` -- random but valid :class:`~qcflag.profiles.ProfileBatch` objects
  (ragged, single-level and empty-valued profiles, NaNs, duplicated and decreasing
  pressures, random manual flags);
* :func:`invalid_batch_arguments` -- keyword arguments that :class:`ProfileBatch` must
  refuse with :class:`~qcflag.exceptions.InvalidProfileError`;
* :func:`valid_csv_texts` / :func:`invalid_csv_texts` -- canonical CSV files as text, the
  invalid ones each with one defect a reader must refuse with a
  :class:`~qcflag.exceptions.QCFlagError`.

All data are invented.
"""

from __future__ import annotations

import hashlib
import math
import os
from collections.abc import Iterable
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd

from qcflag.profiles import ProfileBatch

if TYPE_CHECKING:
    from hypothesis.strategies import SearchStrategy

__all__ = [
    "CSV_HEADER",
    "file_digests",
    "invalid_batch_arguments",
    "invalid_csv_texts",
    "synthetic_profile",
    "valid_batches",
    "valid_csv_texts",
]

CSV_HEADER = "profile_id,cruise,time,latitude,longitude,pressure,temperature,salinity"
"""Header line of a minimal canonical CSV (no flag columns)."""

_FLAG_CODES = (-1, 0, 1, 2, 3, 4, 5, 8, 9)  # NO_FLAG and the Argo reference table 2 codes


def synthetic_profile(
    n_levels: int = 50,
    *,
    max_pressure: float = 1000.0,
    seed: int = 0,
    profile_id: str = "P001",
    cruise: str = "INVENTED01",
    latitude: float = -40.0,
    longitude: float = 10.0,
    time: str = "2021-03-01T12:00:00",
    noise: float = 0.0,
    flags: bool = True,
) -> ProfileBatch:
    """Return one invented, statically stable CTD cast as a batch.

    Parameters
    ----------
    n_levels : int, default=50
        Number of levels (>= 1), evenly spaced from 2 dbar to `max_pressure`.
    max_pressure : float, default=1000.0
        Deepest level, dbar.
    seed : int, default=0
        Seed of the optional noise.
    profile_id, cruise : str
        Identifiers.
    latitude, longitude : float
        Position, degrees north / east (defaults: open South Atlantic).
    time : str
        ISO 8601 UTC time of the cast.
    noise : float, default=0.0
        Standard deviation of white noise added to temperature (degC) and, scaled by 0.5,
        to salinity.
    flags : bool, default=True
        Give every level a manual flag ``1`` (good, Argo scale) for all three variables.

    Returns
    -------
    ProfileBatch
        One profile; temperature 3-18 degC, salinity 34.4-35.4.
    """
    if n_levels < 1:
        raise ValueError("n_levels must be at least 1")
    p = np.linspace(2.0, max_pressure, n_levels) if n_levels > 1 else np.array([2.0])
    shape = np.exp(-np.maximum(p - 30.0, 0.0) / 400.0)  # 30 dbar mixed layer, then decay
    t = 3.0 + 15.0 * shape
    s = 34.4 + 1.0 * shape  # warm and salty above cold and fresh: stable
    if noise:
        rng = np.random.default_rng(seed)
        t = t + rng.normal(0.0, noise, n_levels)
        s = s + rng.normal(0.0, 0.5 * noise, n_levels)
    profiles = pd.DataFrame({
        "profile_id": [profile_id], "cruise": [cruise],
        "time": pd.to_datetime([time]).as_unit("ns"),
        "latitude": [float(latitude)], "longitude": [float(longitude)], "platform": [""],
    })
    codes = {v: np.ones(n_levels, np.int8) for v in ("pressure", "temperature", "salinity")}
    return ProfileBatch(offsets=np.array([0, n_levels]), pressure=p, temperature=t,
                        salinity=s, profiles=profiles, flags=codes if flags else {})


def file_digests(paths: Iterable[str | os.PathLike[str]]) -> dict[str, str]:
    """SHA-256 of every file under `paths` (files, or folders walked recursively).

    Parameters
    ----------
    paths : iterable of path-like
        Files and folders.

    Returns
    -------
    dict of str to str
        Path -> hex digest, for comparing a tree before and after a run.
    """
    out: dict[str, str] = {}
    for item in paths:
        p = Path(item)
        files = sorted(f for f in p.rglob("*") if f.is_file()) if p.is_dir() else [p]
        for f in files:
            out[str(f)] = hashlib.sha256(f.read_bytes()).hexdigest()
    return out


# ------------------------------------------------------------------ hypothesis strategies
def _st() -> Any:
    from hypothesis import strategies as st

    return st


def valid_batches(
    *, max_profiles: int = 4, max_levels: int = 8, flags: bool = True
) -> SearchStrategy[ProfileBatch]:
    """Strategy for valid batches in canonical units, including awkward but legal cases.

    Profiles have 1 to `max_levels` levels; values may be NaN; pressures may repeat or
    decrease; positions and times cover the whole globe and 1950-2035.

    Parameters
    ----------
    max_profiles, max_levels : int
        Size limits.
    flags : bool, default=True
        Draw manual flags (Argo scale, ``NO_FLAG`` included) for a random subset of the
        variables.

    Returns
    -------
    hypothesis.strategies.SearchStrategy
    """
    st = _st()

    def value(lo: float, hi: float) -> Any:
        return st.one_of(st.floats(lo, hi, allow_nan=False), st.just(math.nan))

    @st.composite
    def build(draw: Any) -> ProfileBatch:
        n_prof = draw(st.integers(1, max_profiles))
        counts = draw(st.lists(st.integers(1, max_levels), min_size=n_prof, max_size=n_prof))
        n = sum(counts)

        def levels(lo: float, hi: float) -> np.ndarray:
            return np.array(draw(st.lists(value(lo, hi), min_size=n, max_size=n)), float)

        pressure = levels(0.0, 6000.0)
        if draw(st.booleans()):  # sorted casts with a repeated or reversed level
            pressure = np.sort(pressure)
            if n > 1:
                i = draw(st.integers(1, n - 1))
                pressure[i] = pressure[i - 1] - draw(st.sampled_from([0.0, 1.0]))
        years = draw(st.lists(st.integers(0, 70 * 365 * 86400), min_size=n_prof,  # up to ~2020
                              max_size=n_prof))
        profiles = pd.DataFrame({
            "profile_id": [f"P{i:03d}" for i in range(n_prof)],
            "cruise": draw(st.lists(st.sampled_from(["C1", "C2"]), min_size=n_prof,
                                    max_size=n_prof)),
            "time": (np.datetime64("1950-01-01T00:00:00", "s")
                     + np.array(years, dtype="timedelta64[s]")).astype("datetime64[ns]"),
            "latitude": draw(st.lists(st.floats(-90, 90), min_size=n_prof, max_size=n_prof)),
            "longitude": draw(st.lists(st.floats(-180, 180), min_size=n_prof,
                                       max_size=n_prof)),
            "platform": [""] * n_prof,
        })
        flag_vars = draw(st.sets(st.sampled_from(["pressure", "temperature", "salinity"])))
        codes = {v: np.array(draw(st.lists(st.sampled_from(_FLAG_CODES), min_size=n,
                                           max_size=n)), np.int8)
                 for v in (flag_vars if flags else ())}
        return ProfileBatch(
            offsets=np.concatenate([[0], np.cumsum(counts)]).astype(np.int64),
            pressure=pressure, temperature=levels(-2.5, 40.0), salinity=levels(0.0, 42.0),
            profiles=profiles, flags=codes,
        )

    return build()


def invalid_batch_arguments() -> SearchStrategy[dict[str, Any]]:
    """Strategy for :class:`ProfileBatch` keyword arguments with exactly one defect.

    Defects: offsets not starting at 0 or decreasing, a level array of the wrong length or
    of text, wrong metadata rows or a non-datetime ``time``, non-canonical units, an
    unknown flag variable, or a flag code outside the Argo scale.

    Returns
    -------
    hypothesis.strategies.SearchStrategy
        Dicts to pass as ``ProfileBatch(**kwargs)``.
    """
    st = _st()

    @st.composite
    def build(draw: Any) -> dict[str, Any]:
        base = draw(valid_batches(max_profiles=3, max_levels=5, flags=False))
        n = base.n_levels
        kw: dict[str, Any] = {
            "offsets": base.offsets.copy(), "pressure": base.pressure.copy(),
            "temperature": base.temperature.copy(), "salinity": base.salinity.copy(),
            "profiles": base.profiles.copy(), "flags": {},
        }
        defect = draw(st.sampled_from([
            "offset_start", "offset_order", "length", "text", "rows", "time", "units",
            "flag_variable", "flag_code",
        ]))
        if defect == "offset_start":
            kw["offsets"] = kw["offsets"] + draw(st.integers(1, 3))
        elif defect == "offset_order":
            kw["offsets"] = np.array([0, n + 1, n], np.int64)
        elif defect == "length":
            var = draw(st.sampled_from(["pressure", "temperature", "salinity"]))
            kw[var] = np.append(kw[var], 1.0)
        elif defect == "text":
            var = draw(st.sampled_from(["pressure", "temperature", "salinity"]))
            kw[var] = np.array(["ten"] * n, dtype=object)
        elif defect == "rows":
            kw["profiles"] = pd.concat([kw["profiles"], kw["profiles"].iloc[:1]])
        elif defect == "time":
            kw["profiles"]["time"] = kw["profiles"]["time"].astype(str)
        elif defect == "units":
            kw["units"] = {"pressure": "Pa", "temperature": "degC (ITS-90)",
                           "salinity": "PSS-78"}
        elif defect == "flag_variable":
            kw["flags"] = {"oxygen": np.ones(n, np.int8)}
        else:
            bad = draw(st.sampled_from([6, 7, 10, 42, ord("A")]))
            kw["flags"] = {"temperature": np.full(n, bad, np.int8)}
        return kw

    return build()


def _csv_lines(batch: ProfileBatch) -> list[str]:
    from qcflag.io.common import format_times

    pi = batch.profile_index
    prof = batch.profiles
    times = format_times(prof["time"].to_numpy(dtype="datetime64[ns]"))

    def num(x: float) -> str:
        return "" if math.isnan(x) else repr(float(x))

    return [
        ",".join([str(prof["profile_id"].iat[j]), str(prof["cruise"].iat[j]), times[j],
                  num(prof["latitude"].iat[j]), num(prof["longitude"].iat[j]),
                  num(batch.pressure[i]), num(batch.temperature[i]), num(batch.salinity[i])])
        for i, j in enumerate(pi)
    ]


def valid_csv_texts() -> SearchStrategy[str]:
    """Strategy for canonical CSV text that a reader must accept (one row per level).

    Returns
    -------
    hypothesis.strategies.SearchStrategy
        Text with :data:`CSV_HEADER` and at least one data row per profile.
    """
    return valid_batches(flags=False).map(
        lambda b: CSV_HEADER + "\n" + "\n".join(_csv_lines(b)) + "\n"
    ).filter(lambda text: _has_some_value(text))


def _has_some_value(text: str) -> bool:
    # a reader may refuse a file whose rows hold no measured value at all
    return any(any(f for f in line.split(",")[5:]) for line in text.splitlines()[1:])


def invalid_csv_texts() -> SearchStrategy[tuple[str, str]]:
    """Strategy for canonical CSV text with one defect, and a word the error must contain.

    Defects: empty file, header only, a required column missing, a non-numeric value, a
    time that is not ISO 8601, an unknown flag code, temperature in kelvin, pressure in
    pascal, conductivity (mS/cm) given as salinity.

    Returns
    -------
    hypothesis.strategies.SearchStrategy
        ``(text, needle)`` pairs; the reader's :class:`QCFlagError` message contains
        `needle`.
    """
    st = _st()

    @st.composite
    def build(draw: Any) -> tuple[str, str]:
        b = draw(valid_batches(max_profiles=3, max_levels=6, flags=False))
        lines = _csv_lines(b)
        n = len(lines)
        row = draw(st.integers(0, n - 1))
        defect = draw(st.sampled_from(["empty", "header", "missing", "text", "time", "flag",
                                       "kelvin", "pascal", "conductivity"]))
        header = CSV_HEADER
        fields = [line.split(",") for line in lines]
        if defect == "empty":
            return "", "empty file"
        if defect == "header":
            return header + "\n", "no data rows"
        if defect == "missing":
            col = draw(st.sampled_from([5, 6, 7]))
            name = header.split(",")[col]
            keep = [i for i in range(8) if i != col]
            header = ",".join(header.split(",")[i] for i in keep)
            fields = [[f[i] for i in keep] for f in fields]
            needle = name
        elif defect == "text":
            col = draw(st.sampled_from([5, 6, 7]))
            fields[row][col] = draw(st.sampled_from(["ten", "1;5", "12..3", "abc"]))
            needle = "non-numeric"
        elif defect == "time":
            for f in fields:
                if f[0] == fields[row][0]:
                    f[2] = draw(st.sampled_from(["yesterday", "14/01/2024 noon", "2024-13-45"]))
            needle = "ISO 8601"
        elif defect == "flag":
            header += ",temperature_flag"
            code = draw(st.sampled_from(["7", "6", "X", "12"]))
            fields = [[*f, code if i == row else "1"] for i, f in enumerate(fields)]
            needle = "temperature_flag"
        else:
            col, lo, hi, needle = {"kelvin": (6, 271.0, 310.0, "kelvin"),
                                   "pascal": (5, 2e5, 6e7, "pascal"),
                                   "conductivity": (7, 46.0, 70.0, "conductivity")}[defect]
            vals = draw(st.lists(st.floats(lo, hi), min_size=n, max_size=n))
            for f, v in zip(fields, vals, strict=True):
                f[col] = repr(v)
        return header + "\n" + "\n".join(",".join(f) for f in fields) + "\n", needle

    return build()
