"""Reader/writer throughput against the 300,000 levels/s end-to-end target.

Writes an invented batch (bench/_synthetic.py) as CF NetCDF and canonical CSV into a
temporary folder, then times writing and reading each. Figures come from one run, so the
ratios to the target compare like with like on this machine.
"""

from __future__ import annotations

import tempfile
import time
from pathlib import Path
from typing import Any

from _synthetic import synthetic_batch

from qcflag.io import read_csv, read_netcdf, write_csv, write_netcdf

TARGET = 300_000.0  # levels/s for the whole chain; I/O must be well above it


def main(quick: bool = False) -> list[dict[str, Any]]:
    n = 200_000 if quick else 10_000_000
    batch = synthetic_batch(n, seed=1)
    rows: list[dict[str, Any]] = []
    with tempfile.TemporaryDirectory() as tmp:
        nc, csv = Path(tmp) / "b.nc", Path(tmp) / "b.csv"
        steps = [
            ("write NetCDF", lambda: write_netcdf(batch, nc, history="bench")),
            ("read NetCDF", lambda: read_netcdf(nc)),
            ("write CSV", lambda: write_csv(batch, csv)),
            ("read CSV", lambda: read_csv(csv)),
        ]
        for name, fn in steps:
            t0 = time.perf_counter()
            fn()
            rate = batch.n_levels / (time.perf_counter() - t0)
            rows.append({"benchmark": f"io: {name} ({batch.n_levels} levels)",
                         "figure": "levels/s", "value": round(rate),
                         "unit": f"x{rate / TARGET:.1f} of 300k/s target",
                         "target": TARGET, "met": rate >= TARGET})
    for r in rows:
        print(f"{r['benchmark']:<45} {r['value']:>12,} levels/s  {r['unit']}")
    return rows


if __name__ == "__main__":
    import sys

    main(quick="--quick" in sys.argv)
