"""Helpers for the check tests: reading the real Argo profiles and building small batches."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd

from qcflag import ProfileBatch


def load(paths: list[Path]) -> ProfileBatch:
    """Read Argo profile files with qcflag.io.read_files."""
    from qcflag.io import read_files

    return read_files(paths)


def make_batch(*profiles: dict, lat: float = -30.0, lon: float = -20.0) -> ProfileBatch:
    """Build a batch from dicts with pressure/temperature/salinity lists (+ lat, lon)."""
    rows = []
    for k, prof in enumerate(profiles):
        n = len(prof["pressure"])
        rows.append(pd.DataFrame({
            "profile_id": f"p{k}", "cruise": "TEST",
            "time": pd.Timestamp("2020-06-01"),
            "latitude": prof.get("lat", lat), "longitude": prof.get("lon", lon),
            "pressure": np.asarray(prof["pressure"], dtype=float),
            "temperature": np.asarray(prof.get("temperature", [10.0] * n), dtype=float),
            "salinity": np.asarray(prof.get("salinity", [35.0] * n), dtype=float),
        }))
    return ProfileBatch.from_levels(pd.concat(rows, ignore_index=True))
