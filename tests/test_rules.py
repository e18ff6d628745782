"""Rule sets: built-ins load, every threshold names its source, errors name file and line."""

from __future__ import annotations

import re

import numpy as np
import pytest
from _checks_support import make_batch

from qcflag import RuleSetError
from qcflag.checks import CheckResult
from qcflag.checks.registry import CHECKS, CheckSpec, get_check, register_check
from qcflag.rules import load_rules, run_checks

GOOD = """
[rule_set]
name = "mine"

[[step]]
check = "spike"
variable = "temperature"
shallow_limit = 6.0
deep_limit = 2.0
source = "ARGO-QC test 9"

[[step]]
check = "digit_rollover"
variable = "temperature"
limit = 10.0
"""


def _write(tmp_path, text):
    f = tmp_path / "rules.toml"
    f.write_text(text)
    return f


def test_builtin_rule_sets_load_and_cite_sources():
    for name in ("standard", "coastal"):
        rs = load_rules(name)
        assert rs.name == name and rs.steps
        assert rs.checks[0][0] in CHECKS or rs.checks[0][0] in ("date", "position")
        for step in rs.steps:  # every step says where its numbers come from
            assert step.source, f"{name}: step {step.check} has no source"
        # every numeric threshold line carries a comment or sits in a sourced step
        assert "[from memory]" in rs.text and "[verified" in rs.text
    std, coast = load_rules("standard"), load_rules("coastal")
    s_std = next(s for s in std.steps if s.check == "global_range" and s.variable == "salinity")
    s_co = next(s for s in coast.steps if s.check == "global_range" and s.variable == "salinity")
    assert s_std.params["minimum"] == 2.0 and s_co.params["minimum"] < 2.0  # wider range
    assert load_rules(None).name == "standard"
    assert load_rules(std) is std


def test_standard_matches_published_thresholds():
    # ARGO-QC tests 6, 9, 12, 14 via ../shared/reference/qc-standards.md §1.3 (tag M)
    steps = {(s.check, s.variable): s for s in load_rules("standard").steps}
    assert steps[("spike", "temperature")].params == {"shallow_limit": 6.0, "deep_limit": 2.0,
                                                      "breakpoint": 500.0}
    assert steps[("spike", "salinity")].params["shallow_limit"] == 0.9
    assert steps[("spike", "salinity")].params["deep_limit"] == 0.3
    assert steps[("global_range", "temperature")].params == {"minimum": -2.5, "maximum": 40.0}
    assert steps[("digit_rollover", "salinity")].params == {"limit": 5.0}
    assert steps[("density_inversion", "temperature")].params == {"threshold": 0.03}
    assert steps[("gradient", "temperature")].verdict is False  # obsolete since 2019


def test_user_file_loads(tmp_path):
    rs = load_rules(_write(tmp_path, GOOD))
    assert rs.name == "mine"
    assert rs.checks == [("spike", "temperature", {"shallow_limit": 6.0, "deep_limit": 2.0}),
                         ("digit_rollover", "temperature", {"limit": 10.0})]
    assert rs.steps[0].line == 5 and len(rs.digest) == 64


@pytest.mark.parametrize(
    ("old", "new", "line", "words"),
    [
        ("limit = 10.0", "limmit = 10.0", 15, "no parameter 'limmit'"),
        ("limit = 10.0", 'limit = "ten"', 15, "limit must be"),
        ("deep_limit = 2.0", "deep_limit = -2.0", 9, "deep_limit must be"),
        ('check = "digit_rollover"', 'check = "digit_rollerover"', 13, "unknown check"),
        ('variable = "temperature"\nshallow', 'variable = "oxygen"\nshallow', 7,
         "does not apply"),
        ("deep_limit = 2.0\n", "", 5, "needs parameter 'deep_limit'"),
        ('[rule_set]\nname = "mine"', '[rule_set]\nnmae = "mine"', 3, "unknown key 'nmae'"),
    ],
)
def test_errors_name_file_and_line(tmp_path, old, new, line, words):
    text = GOOD.replace(old, new, 1)
    assert text != GOOD
    f = _write(tmp_path, text)
    with pytest.raises(RuleSetError) as err:
        load_rules(f)
    msg = str(err.value)
    assert msg.startswith(f"{f}, line {line}:"), msg
    assert words in msg
    assert "\n" not in msg


def test_syntax_and_layout_errors(tmp_path):
    f = _write(tmp_path, GOOD.replace("limit = 10.0", "limit = = 10.0"))
    with pytest.raises(RuleSetError, match=r"rules\.toml: not valid TOML: .*line 15"):
        load_rules(f)
    f = _write(tmp_path, GOOD.replace("[[step]]\ncheck = \"digit", "[[steps]]\ncheck = \"digit"))
    with pytest.raises(RuleSetError, match=r"line 12: unknown top-level entry 'steps'"):
        load_rules(f)
    with pytest.raises(RuleSetError, match="no such rule-set file"):
        load_rules(tmp_path / "missing.toml")
    f = _write(tmp_path, '[rule_set]\nname = "x"\n')
    with pytest.raises(RuleSetError, match="no \\[\\[step\\]\\] tables"):
        load_rules(f)


def test_region_errors_name_the_line(tmp_path):
    text = """[[step]]
check = "regional_range"
variable = "temperature"
[[step.regions]]
name = "box"
polygon = [[0.0, 0.0], [0.0, 10.0]]
minimum = 1.0
"""
    with pytest.raises(RuleSetError, match=r"line 6: region #1: polygon must be"):
        load_rules(_write(tmp_path, text))
    text2 = text.replace("[0.0, 10.0]]", "[0.0, 10.0], [10.0, 10.0]]").replace(
        "minimum = 1.0", "minimun = 1.0")
    with pytest.raises(RuleSetError, match=r"line 7: region #1: unknown key 'minimun'"):
        load_rules(_write(tmp_path, text2))


def test_when_available_skips_missing_checks(tmp_path):
    text = GOOD + '\n[[step]]\ncheck = "no_such_check"\nwhen_available = true\n'
    rs = load_rules(_write(tmp_path, text))
    assert rs.skipped == ["no_such_check"] and len(rs.steps) == 2


def test_run_checks_applies_argo_policy_order():
    # a spike (graded 4 by 'spike') is not a neighbour for the later digit rollover step:
    # with the policy the deeper level passes; run alone, rollover fails it.
    b = make_batch({"pressure": [10, 20, 30, 40], "temperature": [10.0, 25.0, 10.1, 10.2]})
    table = run_checks(b, load_rules_from_text(GOOD))
    assert table.results[("spike", "temperature")].grade.tolist() == [0, 4, 1, 0]
    assert table.results[("digit_rollover", "temperature")].grade.tolist() == [0, 4, 1, 1]
    alone = run_checks(b, load_rules_from_text(GOOD.split("[[step]]")[0] + "[[step]]"
                                               + GOOD.split("[[step]]")[2]))
    assert alone.results[("digit_rollover", "temperature")].grade.tolist() == [0, 4, 4, 1]
    assert table.verdict("temperature").tolist() == [1, 4, 1, 1]


def test_run_checks_merges_pressure_part_of_global_range():
    b = make_batch({"pressure": [-6.0, 5.0, 10.0], "temperature": [10.0, 45.0, 10.0]})
    table = run_checks(b, "standard")
    res = table.results[("global_range", "temperature")]
    assert res.grade.tolist() == [4, 4, 1]  # from the pressure rule, then from TEMP > 40
    # the statistic is temperature's own range exceedance (degC), not the pressure one
    np.testing.assert_allclose(res.statistic, [-12.5, 5.0, -12.5])  # margin to -2.5..40
    assert "global_range" in table.checks_for("pressure")
    names, mask = table.fired_mask("temperature")
    assert mask[1] & (1 << names.index("global_range"))


def test_registry_and_plugin_style_registration(tmp_path):
    def deep_water(batch, *, variable, below=1000.0):
        p = batch.pressure
        return CheckResult(p - below, np.where(p > below, 3, 1).astype(np.int8))

    spec = register_check("deep_water_test", deep_water, params={"below": "float"})
    try:
        assert get_check("deep_water_test") is spec
        with pytest.raises(ValueError, match="already registered"):
            register_check("deep_water_test", deep_water)
        text = '[[step]]\ncheck = "deep_water_test"\nvariable = "salinity"\nbelow = 15.0\n'
        b = make_batch({"pressure": [10.0, 20.0]})
        table = run_checks(b, load_rules(_write(tmp_path, text)))
        assert table.results[("deep_water_test", "salinity")].grade.tolist() == [1, 3]
    finally:
        CHECKS.pop("deep_water_test", None)
    with pytest.raises(KeyError, match="unknown check"):
        get_check("deep_water_test")
    assert isinstance(get_check("spike"), CheckSpec)


def load_rules_from_text(text):
    import tempfile
    from pathlib import Path

    with tempfile.TemporaryDirectory() as d:
        f = Path(d) / "r.toml"
        f.write_text(text)
        return load_rules(f)


def test_every_registered_check_documents_its_params():
    for name, spec in CHECKS.items():
        assert re.fullmatch(r"[a-z_]+", name)
        assert spec.description
        if spec.params is not None:
            for key in spec.required:
                assert key in spec.params


def test_rule_sets_parsed_once_per_process_and_handed_out_as_copies(tmp_path, monkeypatch):
    """load_rules parses a set once per process; callers get copies they may change."""
    import copy
    import os

    from qcflag import rules as rules_mod

    monkeypatch.setattr(rules_mod, "_PARSED", {})  # a fresh cache for this test
    parsed = []
    real_parse = rules_mod._parse

    def counting_parse(text, **kw):
        parsed.append(kw["where"])
        return real_parse(text, **kw)

    monkeypatch.setattr(rules_mod, "_parse", counting_parse)
    a, b = load_rules(None), load_rules("standard")
    assert len(parsed) == 1 and a == b and a is not b
    assert a.steps is not b.steps and a.steps[0].params is not b.steps[0].params
    ref = copy.deepcopy(a)
    a.steps.clear()  # callers' changes stay theirs
    b.steps[0].params["changed"] = True
    b.skipped.append("x")
    assert load_rules(None) == ref and len(parsed) == 1
    batch = make_batch({"pressure": [10, 20, 30, 40], "temperature": [10.0, 25.0, 10.1, 10.2]})
    t1, t2 = run_checks(batch), run_checks(batch, "standard")  # the shared set, no copy
    assert len(parsed) == 1
    assert list(t1.results) == list(t2.results) == list(run_checks(batch, ref).results)
    load_rules("coastal")
    assert len(parsed) == 2

    # a file is read on every call and parsed again only when its text changed
    f = _write(tmp_path, GOOD)
    first = load_rules(f)
    assert load_rules(str(f)) == first and len(parsed) == 3
    st = f.stat()
    f.write_text(GOOD.replace("shallow_limit = 6.0", "shallow_limit = 7.0"))  # same size
    os.utime(f, ns=(st.st_atime_ns, st.st_mtime_ns))  # and the same time stamp
    edited = load_rules(f)
    assert len(parsed) == 4 and edited.steps[0].params["shallow_limit"] == 7.0
    f.write_text(GOOD)
    assert load_rules(f) == first and len(parsed) == 4

    # a check registered later gives a new parse (a rule file may name it)
    def always_pass(batch, *, variable):
        return CheckResult(np.zeros(batch.n_levels), np.ones(batch.n_levels, np.int8))

    register_check("cache_probe_test", always_pass, params={})
    try:
        assert load_rules(None) == ref and len(parsed) == 5
    finally:
        CHECKS.pop("cache_probe_test", None)
    assert load_rules(None) == ref and len(parsed) == 5  # registry as before: cached entry

    # errors are not kept; the cache stays bounded
    for _ in range(2):
        with pytest.raises(RuleSetError, match="no such rule-set file"):
            load_rules(tmp_path / "missing.toml")
    for k in range(rules_mod._PARSED_MAX + 2):
        g = tmp_path / f"r{k}.toml"
        g.write_text(GOOD.replace("6.0", f"{6 + k}.0"))
        assert load_rules(g).steps[0].params["shallow_limit"] == 6 + k
    assert len(rules_mod._PARSED) == rules_mod._PARSED_MAX
