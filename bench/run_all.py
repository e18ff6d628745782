"""Run every benchmark module's ``main(quick=...)`` and print one table.

Usage::

    python3 bench/run_all.py            # full sizes (10 million levels; several minutes)
    python3 bench/run_all.py --quick    # small sizes, for a smoke run

Each ``bench/bench_*.py`` module that defines ``main(quick: bool)`` is run in turn. A
module's ``main`` returns rows, each a mapping with ``benchmark``, ``figure``, ``value``
and optionally ``unit``, ``target`` and ``met`` (True/False/None); a module that returns
nothing is assumed to have printed its own results. Figures are measured in the same run,
so ratios between them compare like with like on this machine.
"""

from __future__ import annotations

import argparse
import importlib.util
import sys
import time
import traceback
from collections.abc import Iterable, Mapping
from pathlib import Path
from typing import Any

HERE = Path(__file__).resolve().parent
ORDER = ("bench_io", "bench_checks", "bench_learn", "bench_flagging")


def _modules() -> list[Path]:
    found = {p.stem: p for p in HERE.glob("bench_*.py")}
    ordered = [found.pop(name) for name in ORDER if name in found]
    return ordered + [found[k] for k in sorted(found)]


def _load(path: Path) -> Any:
    spec = importlib.util.spec_from_file_location(f"qcflag_bench_{path.stem}", path)
    assert spec is not None and spec.loader is not None
    module = importlib.util.module_from_spec(spec)
    sys.path.insert(0, str(HERE))
    try:
        spec.loader.exec_module(module)
    finally:
        sys.path.remove(str(HERE))
    return module


def _fmt(value: Any) -> str:
    if isinstance(value, float):
        if value != value:  # NaN
            return "n/a"
        if abs(value) >= 1000:
            return f"{value:,.0f}"
        if abs(value) >= 10:
            return f"{value:.1f}"
        return f"{value:.2f}"
    return str(value)


def _rows(module: str, result: Any) -> list[dict[str, str]]:
    rows = []
    if not isinstance(result, Iterable) or isinstance(result, (str, bytes, Mapping)):
        result = [result] if isinstance(result, Mapping) else []
    for r in result:
        if isinstance(r, Mapping):
            met = r.get("met")
            rows.append({
                "benchmark": str(r.get("benchmark", module)),
                "figure": str(r.get("figure", "")),
                "value": f"{_fmt(r.get('value'))} {r.get('unit', '')}".strip(),
                "target": str(r.get("target", "")),
                "met": "" if met is None else ("yes" if met else "NO"),
            })
        elif isinstance(r, (tuple, list)):
            cells = [_fmt(c) for c in r] + [""] * 5
            rows.append(dict(zip(("benchmark", "figure", "value", "target", "met"),
                                 cells[:5], strict=True)))
    return rows


def table(rows: list[dict[str, str]]) -> str:
    """Format rows as a Markdown table."""
    cols = ("benchmark", "figure", "value", "target", "met")
    widths = {c: max([len(c)] + [len(r[c]) for r in rows]) for c in cols}
    line = "| " + " | ".join(c.ljust(widths[c]) for c in cols) + " |"
    rule = "| " + " | ".join("-" * widths[c] for c in cols) + " |"
    body = ["| " + " | ".join(r[c].ljust(widths[c]) for c in cols) + " |" for r in rows]
    return "\n".join([line, rule, *body])


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="small sizes (smoke run)")
    parser.add_argument("--only", nargs="*", default=None,
                        help="run only these modules (e.g. bench_flagging)")
    args = parser.parse_args(argv)
    rows: list[dict[str, str]] = []
    failed = 0
    t0 = time.perf_counter()
    for path in _modules():
        if args.only and path.stem not in args.only:
            continue
        module = _load(path)
        if not callable(getattr(module, "main", None)):
            continue
        print(f"== {path.stem} (quick={args.quick})", file=sys.stderr, flush=True)
        try:
            result = module.main(quick=args.quick)
        except Exception:
            failed += 1
            traceback.print_exc()
            rows.append({"benchmark": path.stem, "figure": "failed", "value": "",
                         "target": "", "met": "NO"})
            continue
        rows.extend(_rows(path.stem, result))
    print()
    print(table(rows))
    print(f"\n(total {time.perf_counter() - t0:.0f} s; quick={args.quick}; "
          f"command: python3 bench/run_all.py{' --quick' if args.quick else ''})")
    return 1 if failed else 0


if __name__ == "__main__":
    sys.exit(main())
