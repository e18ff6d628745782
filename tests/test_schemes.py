import numpy as np
import pytest

from qcflag.exceptions import QCFlagError
from qcflag.schemes import (
    NO_FLAG,
    SCHEMES,
    State,
    decode,
    encode,
    format_codes,
    get_scheme,
    parse_codes,
    profile_quality,
)


@pytest.mark.parametrize("name", sorted(SCHEMES))
def test_every_code_round_trips_through_grade_and_state(name):
    # decode(code) -> (grade, state) -> encode must give the code back wherever the scheme
    # maps a code to a distinct (grade, state); schemes that map two codes to one pair are
    # lossy by design and say so in their `lossy` notes.
    sch = get_scheme(name)
    g, s = decode(sch.values, sch)
    back = encode(g, s, sch)
    pairs = list(zip(g.tolist(), s.tolist(), strict=True))
    for code, pair, b in zip(sch.values.tolist(), pairs, back.tolist(), strict=True):
        if pairs.count(pair) == 1:
            assert b == code, (name, code, pair)


# Published tables (../shared/reference/qc-standards.md sections 1.6, 2, 3.1, 3.2):
# Argo reference table 2; IOC 2013 primary level (NVS L34); SeaDataNet L20; WOCE CTD codes.
@pytest.mark.parametrize(
    ("scheme", "code", "grade", "state"),
    [
        ("argo", 0, 0, State.NOT_EVALUATED),
        ("argo", 1, 1, State.ASSESSED),
        ("argo", 2, 2, State.ASSESSED),
        ("argo", 3, 3, State.ASSESSED),
        ("argo", 4, 4, State.ASSESSED),
        ("argo", 5, 0, State.CHANGED),
        ("argo", 8, 0, State.INTERPOLATED),
        ("argo", 9, 0, State.MISSING),
        ("ioc", 1, 1, State.ASSESSED),
        ("ioc", 2, 0, State.NOT_EVALUATED),
        ("ioc", 3, 3, State.ASSESSED),
        ("ioc", 4, 4, State.ASSESSED),
        ("ioc", 9, 0, State.MISSING),
        ("woce_ctd", 2, 1, State.ASSESSED),
        ("woce_ctd", 3, 3, State.ASSESSED),
        ("woce_ctd", 4, 4, State.ASSESSED),
        ("woce_ctd", 6, 0, State.INTERPOLATED),
        ("woce_ctd", 7, 0, State.DESPIKED),
        ("woce_ctd", 9, 0, State.NOT_SAMPLED),
        ("l20", 2, 2, State.ASSESSED),
        ("l20", 6, 0, State.BELOW_DETECTION),
        ("l20", ord("B"), 0, State.NOMINAL),
        ("l20", ord("Q"), 0, State.BELOW_QUANTIFICATION),
    ],
)
def test_codes_match_published_tables(scheme, code, grade, state):
    g, s = decode([code], scheme)
    assert (int(g[0]), int(s[0])) == (grade, state)


def test_grade_to_primary_level_identity():
    # Reference crosswalk (../shared/reference/formats-and-conventions.md 6.4, derived):
    # grade -> X -> grade is the identity for good, probably bad and bad in every scheme.
    for name in SCHEMES:
        for grade in (1, 3, 4):
            code = encode([grade], None, name)
            g, s = decode(code, name)
            assert int(g[0]) == grade and s[0] == State.ASSESSED, name


def test_lossy_probably_good_is_documented():
    for name in ("ioc", "woce_ctd"):
        sch = get_scheme(name)
        g, _ = decode(encode([2], None, sch), sch)
        assert g[0] != 2
        assert any("probably good" in note for note in sch.lossy)


def test_unknown_code_is_refused_with_the_scale_named():
    with pytest.raises(QCFlagError, match="not in the Argo"):
        decode([1, 6], "argo")
    with pytest.raises(QCFlagError, match="'xx' is not a flag code"):
        parse_codes(["1", "xx"], "argo", where="f.csv: temperature_flag")


def test_parse_codes_accepts_strings_bytes_floats_and_blanks():
    assert parse_codes([b"1", b" ", b"4"], "argo").tolist() == [1, NO_FLAG, 4]
    assert parse_codes([1.0, np.nan, 9.0], "argo").tolist() == [1, NO_FLAG, 9]
    assert parse_codes(["A", "1", ""], "l20").tolist() == [65, 1, NO_FLAG]
    assert format_codes([65, 1, NO_FLAG]).tolist() == ["A", "1", ""]


def test_unknown_scheme_name():
    with pytest.raises(QCFlagError, match="unknown flag scheme"):
        get_scheme("nope")


@pytest.mark.parametrize(
    ("flags", "letter", "percent"),
    [
        # Argo User's Manual, reference table 2a worked example (../shared/reference/
        # qc-standards.md section 6, E1): 45x1, 5x2, 7x4, 3x9 -> N = 50/57 = 87.7 % -> B
        ([1] * 45 + [2] * 5 + [4] * 7 + [9] * 3, "B", 87.72),
        # formats-and-conventions.md 3.2 worked test: 30x1, 2x2, 1x5, 4x4, 3x9 -> 89.2 % -> B
        ([1] * 30 + [2] * 2 + [5] + [4] * 4 + [9] * 3, "B", 89.19),
        ([1, 1, 1, 3], "B", 75.0),  # E3, boundary 75 % is B
        ([1, 3, 4, 4], "D", 25.0),  # E4
        ([1, 4, 4, 4, 4], "E", 20.0),
        ([4, 4, 4], "F", 0.0),
        ([1, 2, 5, 8], "A", 100.0),
        ([9, 9, 0], " ", np.nan),  # E2: nothing usable
    ],
)
def test_profile_quality_matches_argo_table_2a(flags, letter, percent):
    g, s = decode(flags, "argo")
    pct, letters = profile_quality(g, s, [0, len(flags)])
    assert letters[0] == letter
    np.testing.assert_allclose(pct[0], percent, atol=0.01)
