"""The reports render in a real browser: headless Chromium, networking off, pages from disk.

Skipped with a reason when Debian's chromium is not installed (``.ci/run`` installs it).
"""

from __future__ import annotations

import shutil
import subprocess
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest

from qcflag.report import CAUTION, write_reports

CHROMIUM = Path("/usr/bin/chromium")
pytestmark = [
    pytest.mark.chromium,
    pytest.mark.skipif(not CHROMIUM.exists() and shutil.which("chromium") is None,
                       reason="headless Chromium is not installed (apt-get install chromium)"),
]


def chromium(*args: str, profile: Path, timeout: float = 120) -> subprocess.CompletedProcess:
    exe = str(CHROMIUM) if CHROMIUM.exists() else shutil.which("chromium")
    cmd = [
        exe, "--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
        "--disable-component-update", "--disable-sync", "--no-first-run",
        "--disable-default-apps", "--hide-scrollbars", f"--user-data-dir={profile}",
        "--proxy-server=127.0.0.1:9",  # every request would go to a closed port: no network
        *args,
    ]
    return subprocess.run(cmd, capture_output=True, text=True, timeout=timeout, check=False)


class _Dom(HTMLParser):
    def __init__(self) -> None:
        super().__init__()
        self.ids: dict[str, tuple[str, dict[str, str]]] = {}
        self.imgs: list[dict[str, str]] = []
        self.tables = 0
        self.text: list[str] = []

    def handle_starttag(self, tag, attrs):
        a = {k: v or "" for k, v in attrs}
        if "id" in a:
            self.ids[a["id"]] = (tag, a)
        if tag == "img":
            self.imgs.append(a)
        self.tables += tag == "table"

    def handle_data(self, data):
        self.text.append(data)


@pytest.fixture(scope="module")
def pages(tmp_path_factory):
    from test_report import make_case  # the invented two-cruise test scenario

    batch, result, audit, _ = make_case()
    out = tmp_path_factory.mktemp("chromium") / "reports"
    write_reports(batch, result, out_dir=out, audit_table=audit)
    return batch, out, tmp_path_factory.mktemp("profile")


def dump(path: Path, profile: Path) -> _Dom:
    r = chromium("--dump-dom", path.resolve().as_uri(), profile=profile)
    assert r.returncode == 0, r.stderr[-2000:]
    dom = _Dom()
    dom.feed(r.stdout)
    return dom


def test_cruise_page_renders_with_map_profiles_tables_and_caution(pages):
    batch, out, profile = pages
    dom = dump(out / "AT-101.html", profile)
    assert dom.ids["map"][0] == "figure" and dom.ids["ts-diagram"][0] == "figure"
    profiles = [i for i, (tag, a) in dom.ids.items() if a.get("data-figure") == "profile"]
    ids = batch.profiles.loc[batch.profiles["cruise"] == "AT-101", "profile_id"].tolist()
    assert sorted(dom.ids[i][1]["data-profile-id"] for i in profiles) == sorted(ids)
    for table_id in ("flag-counts", "profiles"):
        assert dom.ids[table_id][0] == "table"
    assert dom.ids["confusion"][0] == "div" and dom.ids["disagreements"][0] == "div"
    assert dom.tables >= 5  # profiles, flag counts, three confusion matrices, ...
    assert {"model-card", "rules", "caution", "figure-data"} <= set(dom.ids)
    text = " ".join(" ".join(dom.text).split())
    assert CAUTION in text
    # every figure is embedded (the browser needed nothing from disk or network)
    assert len(dom.imgs) == 2 + len(ids)
    assert all(a["src"].startswith("data:image/png;base64,") for a in dom.imgs)


def test_index_renders_and_links_every_cruise(pages):
    _, out, profile = pages
    dom = dump(out / "index.html", profile)
    assert dom.ids["cruises"][0] == "table" and "caution" in dom.ids
    assert CAUTION in " ".join(" ".join(dom.text).split())


def test_screenshot_shows_the_page(pages, tmp_path):
    from matplotlib.image import imread

    _, out, profile = pages
    shot = tmp_path / "page.png"
    r = chromium(f"--screenshot={shot}", "--window-size=1280,1600",
                 (out / "AT-102.html").resolve().as_uri(), profile=profile)
    assert r.returncode == 0 and shot.is_file(), r.stderr[-2000:]
    img = imread(shot)[..., :3]
    assert img.shape[:2] == (1600, 1280)
    # the map (shaded bathymetry in greys) and tables must put ink on the page, not a blank
    ink = (img < 0.9).any(axis=2).mean()
    assert ink > 0.05
    assert np.unique((img * 255).astype(np.uint8).reshape(-1, 3), axis=0).shape[0] > 50
