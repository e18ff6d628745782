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


def read_argo_netcdf4(files: list[Path]) -> ProfileBatch:
    """Read Argo files with netCDF4 directly (adjusted values), independent of qcflag.io."""
    import netCDF4

    rows = []
    for f in files:
        with netCDF4.Dataset(f) as d:
            for i in range(d["PRES_ADJUSTED"].shape[0]):
                p = np.ma.filled(d["PRES_ADJUSTED"][i].astype(float), np.nan)
                keep = ~np.isnan(p)
                t = np.ma.filled(d["TEMP_ADJUSTED"][i].astype(float), np.nan)[keep]
                s = np.ma.filled(d["PSAL_ADJUSTED"][i].astype(float), np.nan)[keep]
                when = pd.Timestamp("1950-01-01") + pd.to_timedelta(float(d["JULD"][i]), "D")
                rows.append(pd.DataFrame({
                    "profile_id": f"{f.stem}_{i}", "cruise": f.stem, "time": when,
                    "latitude": float(d["LATITUDE"][i]), "longitude": float(d["LONGITUDE"][i]),
                    "pressure": p[keep], "temperature": t, "salinity": s,
                }))
    return ProfileBatch.from_levels(pd.concat(rows, ignore_index=True))
