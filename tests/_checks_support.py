"""Helpers for the check tests: a small private Argo NetCDF reader and a batch builder.

Used until qcflag.io.read_files is available; the tests prefer read_files when it exists.
"""

from __future__ import annotations

from pathlib import Path

import netCDF4
import numpy as np
import pandas as pd

from qcflag import ProfileBatch


def _text(var) -> str:
    raw = var[:]
    return b"".join(x for x in np.ma.filled(raw, b" ").ravel()).decode().strip()


def read_argo(paths: list[Path]) -> ProfileBatch:
    rows = []
    for path in paths:
        with netCDF4.Dataset(path) as ds:
            ds.set_auto_mask(True)
            pres = np.ma.filled(ds["PRES"][0].astype(float), np.nan)
            temp = np.ma.filled(ds["TEMP"][0].astype(float), np.nan)
            psal = np.ma.filled(ds["PSAL"][0].astype(float), np.nan)
            keep = np.isfinite(pres)
            juld = float(ds["JULD"][0])
            time = pd.Timestamp("1950-01-01") + pd.to_timedelta(juld, unit="D")
            rows.append(pd.DataFrame({
                "profile_id": path.stem, "cruise": path.stem.split("_")[0],
                "time": time, "latitude": float(ds["LATITUDE"][0]),
                "longitude": float(ds["LONGITUDE"][0]),
                "pressure": pres[keep], "temperature": temp[keep], "salinity": psal[keep],
            }))
    return ProfileBatch.from_levels(pd.concat(rows, ignore_index=True))


def load(paths: list[Path]) -> ProfileBatch:
    """Read with qcflag.io.read_files when it exists, else with the private reader."""
    try:
        from qcflag.io import read_files
    except ImportError:
        return read_argo(paths)
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
