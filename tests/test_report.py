"""Per-cruise reports: figures checked by what they drew, tables by their numbers.

The batch here is an invented test scenario (two cruises in the open North Atlantic); the
checks compare what the report drew against the inputs and against outside references:
TEOS-10 via ``gsw`` for the T-S diagram, and the packaged ETOPO5 bathymetry for the map.
"""

from __future__ import annotations

import json
import re
from html.parser import HTMLParser
from pathlib import Path

import gsw
import numpy as np
import pandas as pd
import pytest

from qcflag.checks.base import CheckResult, CheckTable
from qcflag.exceptions import OutputExistsError, QCFlagError
from qcflag.profiles import ProfileBatch
from qcflag.report import CAUTION, GRADE_STYLES, write_reports
from qcflag.report.figures import plot_profile_variable, plot_ts_diagram
from qcflag.report.summary import confusion_matrix, disagreements, headline
from qcflag.result import FlagResult, VariableFlags
from qcflag.schemes import State, encode

N_LEV = 30


# ----------------------------------------------------------------------------- fixtures
def make_case(seed: int = 1, cruises: tuple[str, ...] = ("AT-101", "AT-102"), n_prof: int = 3):
    """A small flagged batch with manual flags, automatic flags and an audit table."""
    rng = np.random.default_rng(seed)
    n_p = len(cruises) * n_prof
    p = np.tile(np.linspace(5, 1450, N_LEV), n_p)
    t = 2.5 + 18 * np.exp(-p / 400) + rng.normal(0, 0.02, p.size)
    s = 34.9 + 0.9 * np.exp(-p / 300) + rng.normal(0, 0.005, p.size)
    t[7] = np.nan  # one missing temperature in the first profile
    lat = 30 + np.arange(n_p) * 0.5
    lon = -40 + np.arange(n_p) * 0.7
    profiles = pd.DataFrame({
        "profile_id": [f"{c}/{k:03d}" for c in cruises for k in range(n_prof)],
        "cruise": np.repeat(cruises, n_prof),
        "time": pd.date_range("2021-05-01", periods=n_p, freq="6h"),
        "latitude": lat, "longitude": lon, "platform": "ship",
    })
    n = p.size
    manual_t = rng.choice([1, 1, 1, 1, 2, 3, 4], size=n)
    manual_s = rng.choice([1, 1, 1, 1, 2, 3, 4], size=n)
    auto_t = np.where(rng.random(n) < 0.7, manual_t, rng.integers(1, 5, n))
    auto_s = np.where(rng.random(n) < 0.7, manual_s, rng.integers(1, 5, n))
    auto_p = np.ones(n, dtype=np.int64)
    state_t = np.zeros(n, dtype=np.int8)
    state_t[7] = State.MISSING
    auto_t[7] = 0
    manual_codes_t = encode(manual_t, None, "argo")
    manual_codes_t[7] = 9  # Argo "missing value"
    batch = ProfileBatch(
        offsets=np.arange(0, n + 1, N_LEV), pressure=p, temperature=t, salinity=s,
        profiles=profiles,
        flags={"temperature": manual_codes_t, "salinity": encode(manual_s, None, "argo")},
    )

    def vf(grade, state):
        conf = np.where(grade > 0, rng.uniform(0.4, 1.0, n), np.nan)
        reasons = np.where(grade >= 3, "spike;gradient", "").astype(object)
        return VariableFlags(grade=grade.astype(np.int8), state=state.astype(np.int8),
                             confidence=conf, reasons=reasons,
                             rule_grade=grade.astype(np.int8), forced=np.zeros(n, bool))

    checks = CheckTable(
        {("spike", "temperature"): CheckResult(np.zeros(n), auto_t.astype(np.int8)),
         ("gradient", "salinity"): CheckResult(np.zeros(n), auto_s.astype(np.int8))},
        n_levels=n,
    )
    result = FlagResult(
        variables={"temperature": vf(auto_t, state_t), "salinity": vf(auto_s, np.zeros(n)),
                   "pressure": vf(auto_p, np.zeros(n))},
        checks=checks, profiles=pd.DataFrame(index=range(n_p)), scheme="argo",
        model_card={"estimator": "boosted", "trained_on": ["C1", "C2"], "n_levels": 12345,
                    "cv": {"temperature": {"boosted": {"mae": {"mean": 0.125, "sd": 0.5}}}},
                    "fusion": {"temperature": {"model_weight": 0.75, "bias": [0.0] * 4}}},
    )
    rows = []
    for var, a, m in (("temperature", auto_t, np.where(np.arange(n) == 7, 0, manual_t)),
                      ("salinity", auto_s, manual_s)):
        vals = batch.values(var)
        conf = result[var].confidence
        rows.append(pd.DataFrame({
            "profile_id": batch.per_level("profile_id"), "cruise": batch.per_level("cruise"),
            "operator": "op", "level": batch.level_index, "pressure": p, "variable": var,
            "value": vals, "manual_code": m, "manual_grade": m, "auto_grade": a,
            "confidence": conf, "grade_gap": a - m, "score": np.abs(a - m) * conf,
            "reasons": result[var].reasons,
        }))
    audit = pd.concat(rows, ignore_index=True)
    audit = audit[audit["auto_grade"] != audit["manual_grade"]].reset_index(drop=True)
    truth = {"manual": {"temperature": np.where(np.arange(n) == 7, 0, manual_t),
                        "salinity": manual_s},
             "auto": {"temperature": auto_t, "salinity": auto_s, "pressure": auto_p}}
    return batch, result, audit, truth


class _Collect(HTMLParser):
    """Collect elements' attributes by id, all hrefs/srcs, and the figure-data JSON."""

    def __init__(self) -> None:
        super().__init__()
        self.by_id: dict[str, dict[str, str]] = {}
        self.elements: list[tuple[str, dict[str, str]]] = []
        self.links: list[str] = []
        self.srcs: list[str] = []
        self._in_data = False
        self.figure_data = ""
        self.text: list[str] = []

    def handle_starttag(self, tag, attrs):
        a = {k: v or "" for k, v in attrs}
        self.elements.append((tag, a))
        if "id" in a:
            self.by_id[a["id"]] = {"tag": tag, **a}
        if tag == "a" and "href" in a:
            self.links.append(a["href"])
        if "src" in a:
            self.srcs.append(a["src"])
        self._in_data = tag == "script" and a.get("id") == "figure-data"

    def handle_endtag(self, tag):
        if tag == "script":
            self._in_data = False

    def handle_data(self, data):
        if self._in_data:
            self.figure_data += data
        self.text.append(data)


def parse(path: Path) -> _Collect:
    c = _Collect()
    c.feed(path.read_text(encoding="utf-8"))
    return c


@pytest.fixture(scope="module")
def report(tmp_path_factory):
    batch, result, audit, truth = make_case()
    out = tmp_path_factory.mktemp("rep") / "reports"
    files = write_reports(batch, result, out_dir=out, audit_table=audit,
                          rules=_Rules("test-rules", "[spike]\nthreshold = 6.0  # <b>x</b>"))
    return batch, result, audit, truth, out, files


class _Rules:
    def __init__(self, name, text):
        self.name, self.text = name, text


# ----------------------------------------------------------------------------- tests
def test_files_written_and_self_contained(report):
    _, _, _, _, out, files = report
    names = sorted(f.name for f in files)
    assert names == sorted(["index.html", "index.json", "AT-101.html", "AT-101.json",
                            "AT-102.html", "AT-102.json"])
    assert all(f.is_file() for f in files)
    assert sorted(p.name for p in out.iterdir()) == names  # nothing else, no temp files
    assert not [p for p in out.parent.iterdir() if p.name.startswith(".")]
    for f in out.glob("*.html"):
        page = parse(f)
        text = f.read_text()
        assert all(s.startswith("data:image/png;base64,") for s in page.srcs)
        assert "<link" not in text and "http://" not in text and "https://" not in text
        assert not [e for e in page.elements if e[0] == "script"
                    and e[1].get("type") != "application/json"]


def test_profile_figures_colour_each_level_by_its_grade(report):
    batch, _, _, truth, out, _ = report
    page = parse(out / "AT-101.html")
    data = json.loads(page.figure_data)
    ids = batch.profiles["profile_id"].tolist()
    cruise_ids = [i for i in ids if i.startswith("AT-101")]
    assert len(data["profiles"]) == len(cruise_ids)
    for k, pid in enumerate(ids):
        if pid not in cruise_ids:
            continue
        anchor = "profile-" + re.sub(r"[^A-Za-z0-9_-]+", "_", pid)
        fig = page.by_id[anchor]  # the figure exists in the DOM with its data attributes
        assert fig["data-profile-id"] == pid and fig["data-n-levels"] == str(N_LEV)
        d = data["profiles"][anchor]
        sl = slice(k * N_LEV, (k + 1) * N_LEV)
        for var in ("temperature", "salinity"):
            values = batch.values(var)[sl]
            drawn = np.flatnonzero(np.isfinite(values))
            assert d[var]["level"] == drawn.tolist()  # NaN levels are not drawn
            assert np.allclose(d[var]["pressure"], batch.pressure[sl][drawn], atol=1e-3)
            assert np.allclose(d[var]["value"], values[drawn], atol=1e-3)
            auto = truth["auto"][var][sl][drawn]
            man = truth["manual"][var][sl][drawn]
            assert d[var]["auto_grade"] == auto.tolist()
            assert d[var]["manual_grade"] == man.tolist()
            assert d[var]["auto_colour"] == [GRADE_STYLES[g].colour for g in auto]
            assert d[var]["manual_colour"] == [GRADE_STYLES[g].colour for g in man]


def test_profile_plot_pressure_increases_downward_and_markers_by_grade():
    from qcflag.report.figures import new_figure

    fig = new_figure(4, 4)
    ax, strip = fig.subplots(1, 2, sharey=True)
    p = np.array([0.0, 10, 20, 30, 40])
    v = np.array([10.0, 9, np.nan, 7, 6])
    pl = plot_profile_variable(p, v, [1, 4, 3, 2, 4], [1, 1, 1, 2, 0], variable="temperature",
                               ax=ax, manual_ax=strip)
    lo, hi = ax.get_ylim()
    assert lo > hi  # y axis inverted: larger pressure lower on the page
    assert pl.level.tolist() == [0, 1, 3, 4]
    # one scatter per grade present, each with that grade's marker face colour
    from matplotlib.colors import to_hex

    main = [a for a in pl.artists if hasattr(a, "get_offsets") and a.axes is ax]
    by_label = {a.get_label(): a for a in main}
    assert set(by_label) == {"good", "bad", "probably good"}
    bad = by_label["bad"]
    assert np.allclose(bad.get_offsets()[:, 1], [10, 40])
    assert to_hex(bad.get_facecolor()[0]).lower() == GRADE_STYLES[4].colour.lower()


def test_map_shows_every_station_on_packaged_bathymetry(report):
    from qcflag.reference import seafloor_depth

    batch, _, _, truth, out, _ = report
    page = parse(out / "AT-102.html")
    assert page.by_id["map"]["data-n-stations"] == "3"
    m = json.loads(page.figure_data)["map"]
    prof = batch.profiles[batch.profiles["cruise"] == "AT-102"]
    # labelled by profile id without the cruise name: "AT-102/001" -> "001"
    assert m["label"] == [pid.split("/")[1] for pid in prof["profile_id"]]
    assert np.allclose(m["longitude"], prof["longitude"]) and np.allclose(
        m["latitude"], prof["latitude"])
    lon0, lon1, lat0, lat1 = m["extent"]
    assert (lon0 < prof["longitude"]).all() and (prof["longitude"] < lon1).all()
    assert (lat0 < prof["latitude"]).all() and (prof["latitude"] < lat1).all()
    # worst automatic grade per profile sets the marker colour
    idx = prof.index.to_numpy()
    worst = np.max([truth["auto"][v].reshape(-1, N_LEV)[idx].max(axis=1)
                    for v in ("temperature", "salinity", "pressure")], axis=0)
    assert m["grade"] == worst.tolist()
    assert m["colour"] == [GRADE_STYLES[g].colour for g in worst]
    # the shaded grid is the packaged ETOPO5-derived bathymetry: the stations sit in the
    # deep North Atlantic (mid-ocean ridge flank, ~30 N 40 W: 2-5 km deep, from memory), so the
    # depth shading must reach at least as deep as the sea floor under every station
    assert m["grid_shape"][0] > 10 and m["grid_shape"][1] > 10
    assert m["bathymetry_source"]
    depth = seafloor_depth(prof["latitude"], prof["longitude"])
    assert (depth > 1500).all()
    assert max(m["depth_levels"]) >= depth.max()


def test_ts_diagram_matches_teos10(report):
    batch, _, _, truth, out, _ = report
    page = parse(out / "AT-101.html")
    ts = json.loads(page.figure_data)["ts_diagram"]
    sel = np.flatnonzero(batch.per_level("cruise") == "AT-101")
    sp, t, p = batch.salinity[sel], batch.temperature[sel], batch.pressure[sel]
    lon, lat = batch.per_level("longitude")[sel], batch.per_level("latitude")[sel]
    ok = np.isfinite(t)
    assert ts["index"] == np.flatnonzero(ok).tolist()
    # TEOS-10 (IOC, SCOR and IAPSO 2010), via the gsw library
    sa = gsw.SA_from_SP(sp[ok], p[ok], lon[ok], lat[ok])
    ct = gsw.CT_from_t(sa, t[ok], p[ok])
    assert np.allclose(ts["SA"], sa, atol=1e-4) and np.allclose(ts["CT"], ct, atol=1e-4)
    g = np.maximum(truth["auto"]["temperature"], truth["auto"]["salinity"])[sel][ok]
    assert ts["grade"] == g.tolist()
    assert ts["colour"] == [GRADE_STYLES[k].colour for k in g]
    levels = ts["sigma0_levels"]
    assert len(levels) >= 3 and page.by_id["ts-diagram"]["data-sigma0-levels"]
    sig = gsw.sigma0(sa, ct)
    assert min(levels) < sig.max() and max(levels) > sig.min()


def test_ts_contour_field_is_gsw_sigma0():
    rng = np.random.default_rng(3)
    sp = rng.uniform(34, 36, 50)
    t = rng.uniform(2, 25, 50)
    p = rng.uniform(0, 1000, 50)
    d = plot_ts_diagram(sp, t, p, np.full(50, -30.0), np.full(50, 30.0), np.ones(50, int))
    i, j = 17, 41
    # potential density anomaly at 0 dbar from TEOS-10 (gsw), at one grid node
    assert d.sigma0[i, j] == pytest.approx(gsw.sigma0(d.SA_grid[j], d.CT_grid[i]), abs=1e-9)
    assert d.SA_grid.min() <= d.SA.min() and d.SA_grid.max() >= d.SA.max()
    # a contour level passes between the lightest and densest grid corners
    assert d.sigma0.min() < d.sigma0_levels[0] and d.sigma0_levels[-1] < d.sigma0.max()


def _table_rows(path: Path, table_id: str) -> list[dict[str, str]]:
    text = path.read_text()
    start = text.index(f'id="{table_id}"')
    end = text.index("</table>", start)
    c = _Collect()
    c.feed(text[start - 10:end])
    return [a for tag, a in c.elements if tag in ("tr", "td") and a]


def test_flag_counts_and_confusion_tables(report):
    batch, _, _, truth, out, _ = report
    page = out / "AT-102.html"
    rows = [r for r in _table_rows(page, "flag-counts") if "data-variable" in r]
    sel = batch.per_level("cruise") == "AT-102"
    for var in ("temperature", "salinity", "pressure"):
        auto = truth["auto"][var][sel]
        man = truth["manual"].get(var, np.zeros(sel.size, int))[sel]
        got = {int(r["data-grade"]): (int(r["data-auto"]), int(r["data-manual"]))
               for r in rows if r["data-variable"] == var}
        for g in (1, 2, 3, 4, 0):
            assert got[g] == (int((auto == g).sum()), int((man == g).sum()))
    # confusion: rows manual, columns automatic, compared with pandas.crosstab
    summary = json.loads((out / "AT-102.json").read_text())
    for var in ("temperature", "salinity"):
        auto = truth["auto"][var][sel]
        man = truth["manual"][var][sel]
        ct = pd.crosstab(man, auto).reindex(index=[1, 2, 3, 4, 0], columns=[1, 2, 3, 4, 0],
                                            fill_value=0)
        assert summary["confusion"][var]["counts"] == ct.to_numpy().tolist()
    c = parse(page)
    assert c.by_id["confusion"]["data-table"] == "confusion"


def test_headline_numbers_and_index(report):
    batch, _, audit, truth, out, _ = report
    idx = json.loads(parse(out / "index.html").figure_data)
    assert [c["cruise"] for c in idx["cruises"]] == ["AT-101", "AT-102"]
    for c in idx["cruises"]:
        sel = batch.per_level("cruise") == c["cruise"]
        worst_a = np.max([truth["auto"][v][sel] for v in truth["auto"]], axis=0)
        worst_m = np.max([truth["manual"][v][sel] for v in truth["manual"]], axis=0)
        assert c["percent_flagged_auto"] == pytest.approx(100 * (worst_a >= 3).mean(), abs=0.01)
        assert c["percent_flagged_manual"] == pytest.approx(100 * (worst_m >= 3).mean(),
                                                            abs=0.01)
        a = np.concatenate([truth["auto"][v][sel] for v in ("temperature", "salinity")])
        m = np.concatenate([truth["manual"][v][sel] for v in ("temperature", "salinity")])
        both = (a > 0) & (m > 0)
        assert c["agreement_exact"] == pytest.approx(100 * (a == m)[both].mean(), abs=0.01)
        assert c["n_profiles"] == 3 and c["n_levels"] == 3 * N_LEV
        assert c["n_disagreements"] == int((audit["cruise"] == c["cruise"]).sum())
    links = parse(out / "index.html").links
    assert "AT-101.html" in links and "AT-102.json" in links


def test_disagreement_list_links_to_profile_figures(report):
    _, _, audit, _, out, _ = report
    page = out / "AT-101.html"
    c = parse(page)
    rows = [r for r in _table_rows(page, "disagreements") if "data-level" in r]
    expect = audit[audit["cruise"] == "AT-101"]
    assert int(c.by_id["disagreements"]["data-count"]) == len(expect)
    assert len(rows) == min(len(expect), 200)
    got = {(r["data-profile-id"], int(r["data-level"]), r["data-variable"]) for r in rows}
    want = set(zip(expect["profile_id"], expect["level"], expect["variable"], strict=True))
    assert got == want
    anchors = [h[1:] for h in c.links if h.startswith("#profile-")]
    assert anchors and all(a in c.by_id and c.by_id[a]["data-figure"] == "profile"
                           for a in anchors)


def test_caution_model_card_and_rules_on_every_page(report):
    _, _, _, _, out, _ = report
    for f in out.glob("*.html"):
        c = parse(f)
        assert "caution" in c.by_id
        text = " ".join(c.text)
        assert CAUTION in " ".join(text.split())
    c = parse(out / "AT-101.html")
    assert c.by_id["model-card"]["data-has-model"] == "true"
    assert c.by_id["rules"]["data-rule-set"] == "test-rules"
    html = (out / "AT-101.html").read_text()
    assert "<details>" in html and "&lt;b&gt;x&lt;/b&gt;" in html  # rule text escaped
    assert "boosted" in html
    # the card's cross-validation scores are tabulated, the calibration summarised
    assert 'data-model="boosted"' in html and "0.125 \u00b1 0.500" in html
    assert "model weight 0.75" in html and "bias" not in html
    for f in out.glob("*.json"):
        assert json.loads(f.read_text())["caution"] == CAUTION


def test_refuses_existing_output_and_overwrites_atomically(tmp_path):
    batch, result, audit, _ = make_case(seed=2, cruises=("X",), n_prof=2)
    out = tmp_path / "r"
    out.mkdir()
    (out / "keep.txt").write_text("x")
    with pytest.raises(OutputExistsError, match="--overwrite"):
        write_reports(batch, result, out_dir=out, audit_table=audit)
    assert (out / "keep.txt").exists()
    write_reports(batch, result, out_dir=out, audit_table=audit, overwrite=True)
    assert not (out / "keep.txt").exists() and (out / "X.html").exists()
    assert sorted(p.name for p in tmp_path.iterdir()) == ["r"]  # no temp dirs left


def test_mismatched_result_is_refused_and_leaves_nothing(tmp_path):
    batch, result, audit, _ = make_case(seed=2, cruises=("X",), n_prof=2)
    with pytest.raises(QCFlagError, match="levels"):
        write_reports(batch[:1], result, out_dir=tmp_path / "r", audit_table=audit)
    assert list(tmp_path.iterdir()) == []


def test_hostile_cruise_names_are_escaped_and_file_safe(tmp_path):
    batch, result, audit, _ = make_case(seed=4, cruises=("<script>x</script>", "index"),
                                        n_prof=1)
    files = write_reports(batch, result, out_dir=tmp_path / "r", audit_table=audit,
                          model_card={})
    names = sorted(f.name for f in files)
    assert "index.html" in names and "index-2.html" in names
    assert all(re.fullmatch(r"[A-Za-z0-9._-]+", n) for n in names)
    for f in (tmp_path / "r").glob("*.html"):
        text = f.read_text()
        assert "<script>x</script>" not in text
        json.loads(parse(f).figure_data)  # still valid JSON
    c = parse(tmp_path / "r" / "index-2.html")
    assert c.by_id["model-card"]["data-has-model"] == "false"


def test_summary_helpers_against_pandas():
    rng = np.random.default_rng(5)
    a = rng.integers(0, 5, 400)
    m = rng.integers(0, 5, 400)
    cm = confusion_matrix(m, a)
    ct = pd.crosstab(m, a).reindex(index=[1, 2, 3, 4, 0], columns=[1, 2, 3, 4, 0],
                                   fill_value=0)
    assert (cm.to_numpy() == ct.to_numpy()).all()
    h = headline({"t": a}, {"t": m}, 0)
    both = (a > 0) & (m > 0)
    assert h["agreement_pass_fail"] == pytest.approx(
        100 * ((a >= 3) == (m >= 3))[both].mean(), abs=0.01)
    tab = pd.DataFrame({"profile_id": ["a"] * 4, "cruise": "c", "level": range(4),
                        "pressure": 1.0, "variable": "temperature", "value": 1.0,
                        "manual_grade": [1, 1, 0, 4], "auto_grade": [1, 4, 3, 0],
                        "confidence": 0.9, "grade_gap": [0, 3, 3, -4], "score": [0, 1, 2, 3],
                        "reasons": ""})
    d = disagreements(tab)
    assert d["level"].tolist() == [3, 2, 1]  # equal grades dropped, highest score first


@pytest.mark.shared
def test_report_on_real_argo_profiles(argo_files, tmp_path):
    """Real, expert-passed Argo profiles (../shared/data/argo, Argo GDAC, doi:10.17882/42182)."""
    from qcflag.io import read_files
    from qcflag.pipeline import flag_batch
    from qcflag.reference import seafloor_depth

    batch = read_files(argo_files)
    result = flag_batch(batch)  # rules only
    out = tmp_path / "argo"
    write_reports(batch, result, out_dir=out)
    # positions as listed in ../shared/data/README.md (from the files' own metadata)
    published = {"4900785": (27.9, -75.9), "4901052": (14.6, -150.3),
                 "3901602": (43.8, -58.8)}
    for k, pid in enumerate(batch.profiles["profile_id"]):
        cruise = str(batch.profiles["cruise"].iloc[k])
        page = parse(out / f"{cruise}.html")
        data = json.loads(page.figure_data)
        lat, lon = published[cruise]
        assert data["map"]["latitude"][0] == pytest.approx(lat, abs=0.06)
        assert data["map"]["longitude"][0] == pytest.approx(lon, abs=0.06)
        # profiling floats drift in deep water (the shallowest of the three, off Nova
        # Scotia, has ~860 m under it on the packaged ETOPO5 grid): the map shows sea there
        assert seafloor_depth(lat, lon) > 500
        assert max(data["map"]["depth_levels"]) >= seafloor_depth(lat, lon)
        # every level of these files carries the expert's flag 1: all manual marks "good"
        fig = next(iter(data["profiles"].values()))
        assert fig["profile_id"] == pid
        for var in ("temperature", "salinity"):
            assert set(fig[var]["manual_grade"]) == {1}
            assert set(fig[var]["manual_colour"]) == {GRADE_STYLES[1].colour}
        summary = json.loads((out / f"{cruise}.json").read_text())
        n = int(batch.counts[k])
        assert summary["flag_counts"]["temperature"]["1"]["manual"] == n
        # T-S points are TEOS-10 values of the real levels
        sel = slice(int(batch.offsets[k]), int(batch.offsets[k + 1]))
        ok = np.isfinite(batch.temperature[sel]) & np.isfinite(batch.salinity[sel])
        sa = gsw.SA_from_SP(batch.salinity[sel][ok], batch.pressure[sel][ok], lon, lat)
        assert np.allclose(data["ts_diagram"]["SA"], sa, atol=2e-3)


def test_batch_without_manual_flags(tmp_path):
    from dataclasses import replace

    batch, result, _, truth = make_case(seed=6, cruises=("NF",), n_prof=2)
    bare = replace(batch, flags={})
    write_reports(bare, result, out_dir=tmp_path / "r")
    summary = json.loads((tmp_path / "r" / "NF.json").read_text())
    n = summary["numbers"]
    assert n["percent_flagged_manual"] is None and n["n_compared"] == 0
    assert n["n_disagreements"] == 0 and summary["disagreements"] == []
    worst = np.max([truth["auto"][v] for v in truth["auto"]], axis=0)
    assert n["percent_flagged_auto"] == pytest.approx(100 * (worst >= 3).mean(), abs=0.01)
    assert "has no manual flags to compare with" in (tmp_path / "r" / "NF.html").read_text()
