"""qcflag as one step of a processing chain: read -> calibrate -> flag -> write.

Run it::

    python3 examples/chain_example.py            # writes into a temporary folder
    python3 examples/chain_example.py --out DIR  # or into DIR

The profiles are invented (qcflag.simulate) and so is the calibration: a constant
salinity offset, standing in for a correction a data centre would derive from bottle
samples or a reference sensor. The point is the shape of the chain: every step takes an
``xarray.Dataset`` and returns a new one, qcflag's step is ``ds.qcflag.flag(...)``, and the
dataset can be dask-backed (``--chunk``) so the flags are only computed when written.

Automated flags assist expert quality control; they do not replace it.
"""

from __future__ import annotations

import argparse
import tempfile
from pathlib import Path

import numpy as np
import xarray as xr

import qcflag  # noqa: F401  (registers the ds.qcflag accessor)
from qcflag.io import atomic_output, write
from qcflag.simulate import SimulationConfig, simulate_archive

SALINITY_OFFSET = -0.012  # invented: "the cruise's salinity reads 0.012 high"


def make_input(folder: Path) -> Path:
    """Write a small invented cruise as CF contiguous ragged NetCDF (the chain's input)."""
    cfg = SimulationConfig(casts_per_cruise=6, floats_per_cruise=1, max_cast_pressure=1500)
    batch = simulate_archive(1, seed=7, config=cfg)
    path = folder / "cruise_raw.nc"
    write(batch, path, overwrite=True, history="chain example: invented raw cruise")
    return path


def calibrate(ds: xr.Dataset, offset: float) -> xr.Dataset:
    """Apply a constant salinity offset; return a new dataset (the input is untouched)."""
    sal = ds["salinity"]
    corrected = (sal + offset).assign_attrs(
        sal.attrs,
        comment=f"corrected by a constant offset of {offset:+.4f} (invented calibration)",
    )
    corrected.encoding = dict(sal.encoding)
    history = f"{ds.attrs.get('history', '')}\nchain example: salinity offset {offset:+.4f}"
    return ds.assign(salinity=corrected, salinity_uncorrected=sal).assign_attrs(
        history=history.strip())


def main(argv: list[str] | None = None) -> Path:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--out", type=Path, default=None, help="output folder")
    parser.add_argument("--chunk", type=int, default=0,
                        help="open the input with dask chunks of this many levels")
    args = parser.parse_args(argv)
    folder = args.out or Path(tempfile.mkdtemp(prefix="qcflag-chain-"))
    folder.mkdir(parents=True, exist_ok=True)

    # 1. read
    raw_path = make_input(folder)
    chunks = {"obs": args.chunk} if args.chunk else None
    with xr.open_dataset(raw_path, chunks=chunks) as raw:
        # 2. calibrate
        calibrated = calibrate(raw, SALINITY_OFFSET)
        # 3. flag (lazy if the dataset is dask-backed)
        flagged = calibrated.qcflag.flag(rules="standard")
        # 4. write, atomically. (xarray must see the variable-length reason strings to write
        # them, so a lazy result is computed once here, block by block, before writing.)
        if args.chunk:
            flagged = flagged.compute()
        out_path = folder / "cruise_flagged.nc"
        with atomic_output(out_path, overwrite=True) as tmp:
            flagged.to_netcdf(tmp)

    with xr.open_dataset(out_path) as done:
        for var in ("temperature", "salinity"):
            codes = done[f"{var}_flag_auto"].values
            vals, counts = np.unique(codes[np.isfinite(codes)], return_counts=True)
            shown = ", ".join(f"flag {int(v)}: {c}" for v, c in zip(vals, counts, strict=True))
            print(f"{var:>11}: {shown}")
        print(f"salinity ancillary variables: {done['salinity'].attrs['ancillary_variables']}")
    print(f"wrote {out_path}")
    return out_path


if __name__ == "__main__":
    main()
