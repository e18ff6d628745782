"""Regenerate the invented demo scenario in ``examples/demo/`` (byte-identical CSV).

Run from the repository root::

    python examples/make_demo_data.py

Everything written is invented: the Solvaig Margin Programme, its vessels, stations, floats,
operators and every value are simulated by :mod:`qcflag.simulate` with known truth (the
``truth_*`` columns). See ``examples/demo/scenario.json`` for the seed and configuration.
"""

from __future__ import annotations

import sys
from pathlib import Path

from qcflag.simulate import demo_config, write_scenario

DEMO_DIR = Path(__file__).resolve().parent / "demo"
N_CRUISES = 4
SEED = 0


def main() -> int:
    paths = write_scenario(DEMO_DIR, n_cruises=N_CRUISES, seed=SEED, config=demo_config(),
                           formats=("csv",), overwrite=True)
    for p in paths:
        print(p.relative_to(DEMO_DIR.parent.parent))
    return 0


if __name__ == "__main__":
    sys.exit(main())
