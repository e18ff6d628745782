"""Render the README screenshot of a cruise report page with headless Chromium.

Usage::

    python examples/screenshot.py                      # runs the demo in a temporary folder
    python examples/screenshot.py --demo qcflag-demo   # uses an existing demo folder
    python examples/screenshot.py --page reports/SMP19-005.html --out docs/cruise_page.png

Needs Debian's ``chromium`` (``apt-get install chromium``). Networking is switched off for
the browser (every request would go to a closed local port): the page needs nothing but
itself.
"""

from __future__ import annotations

import argparse
import shutil
import subprocess
import sys
import tempfile
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def find_chromium() -> str:
    for name in ("chromium", "chromium-browser"):
        exe = shutil.which(name)
        if exe:
            return exe
    sys.exit("error: chromium is not installed (apt-get install chromium)")


def screenshot(page: Path, out: Path, *, width: int = 1280, height: int = 2000) -> Path:
    """Save a PNG of `page` as rendered by headless Chromium at `width` x `height`."""
    out.parent.mkdir(parents=True, exist_ok=True)
    with tempfile.TemporaryDirectory() as profile:
        tmp = out.with_name(f".{out.name}.tmp.png")
        cmd = [
            find_chromium(), "--headless", "--no-sandbox", "--disable-gpu",
            "--disable-background-networking", "--disable-component-update", "--disable-sync",
            "--no-first-run", "--hide-scrollbars", f"--user-data-dir={profile}",
            "--proxy-server=127.0.0.1:9", f"--screenshot={tmp}",
            f"--window-size={width},{height}", page.resolve().as_uri(),
        ]
        subprocess.run(cmd, check=True, capture_output=True, timeout=180)
        tmp.replace(out)
    return out


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--demo", type=Path, help="existing demo folder (qcflag demo --out DIR)")
    ap.add_argument("--page", type=Path, help="report page to capture (overrides --demo)")
    ap.add_argument("--out", type=Path, default=ROOT / "docs" / "cruise_page.png")
    args = ap.parse_args()

    with tempfile.TemporaryDirectory() as tmp:
        page = args.page
        if page is None:
            demo = args.demo
            if demo is None:
                from qcflag.demo import run_demo

                demo = run_demo(Path(tmp) / "qcflag-demo", n_cruises=6, seed=0).out_dir
            pages = sorted(p for p in (demo / "reports").glob("*.html") if p.name != "index.html")
            if not pages:
                sys.exit(f"error: no cruise pages in {demo / 'reports'}")
            page = pages[0]
        out = screenshot(page, args.out)
    size = out.stat().st_size
    print(f"wrote {out} ({size / 1024:.0f} KiB) from {page.name}")
    if size > 1024 * 1024:
        print("warning: the screenshot is over 1 MiB", file=sys.stderr)


if __name__ == "__main__":
    main()
