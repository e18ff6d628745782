"""Flag scales: published codes <-> the internal ordinal grade and non-ordinal state.

Internally every level carries two small integers:

``grade``
    The ordinal quality, :class:`Grade` (1 good < 2 probably good < 3 probably bad < 4 bad),
    or 0 where the flag says nothing about quality on that order.
``state``
    A :class:`State` that is not on the order (missing, not evaluated, value changed,
    interpolated, ...). ``State.ASSESSED`` means the flag is a plain quality grade.

Flag codes themselves are stored as ``int8``: a digit code ``"3"`` is the integer 3, a
letter code (SeaDataNet ``"A"``, ``"B"``, ``"Q"``) is its ASCII ordinal, and
:data:`NO_FLAG` (-1) marks a level that carries no flag at all (Argo's blank).

Each scheme is a table; converting a code to (grade, state) and back is a table look-up,
vectorised over whole batches. Where a scheme cannot express a grade or state, the
``encode`` direction falls back to the nearest code and the scheme's ``lossy`` notes say so.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from enum import IntEnum
from typing import TYPE_CHECKING

import numpy as np

from qcflag.exceptions import QCFlagError

if TYPE_CHECKING:
    from numpy.typing import ArrayLike, NDArray

__all__ = [
    "NO_FLAG",
    "SCHEMES",
    "FlagCode",
    "FlagScheme",
    "Grade",
    "State",
    "decode",
    "encode",
    "format_codes",
    "get_scheme",
    "parse_codes",
    "profile_quality",
]

NO_FLAG = -1
"""Stored code of a level that carries no flag (Argo's blank ``" "``, an empty CSV cell)."""


class Grade(IntEnum):
    """Ordinal quality grade: larger is worse."""

    GOOD = 1
    PROBABLY_GOOD = 2
    PROBABLY_BAD = 3
    BAD = 4


class State(IntEnum):
    """Non-ordinal states a flag can carry instead of (or beside) a grade."""

    ASSESSED = 0
    ABSENT = 1
    NOT_EVALUATED = 2
    MISSING = 3
    CHANGED = 4
    INTERPOLATED = 5
    DESPIKED = 6
    NOT_CALIBRATED = 7
    NOT_REPORTED = 8
    BELOW_DETECTION = 9
    IN_EXCESS = 10
    NOMINAL = 11
    UNCERTAIN = 12
    BELOW_QUANTIFICATION = 13
    REPLICATE_MEAN = 14
    PEAK_MANUAL = 15
    PEAK_IRREGULAR = 16
    NOT_SAMPLED = 17


@dataclass(frozen=True)
class FlagCode:
    """One code of a published flag scale.

    Parameters
    ----------
    code : str
        The code as written in files (``"1"``, ``"A"``).
    meaning : str
        CF ``flag_meanings`` token (letters, digits and ``_ - . + @`` only).
    grade : int
        Ordinal grade 1-4 or 0 where the code is not on the order.
    state : State
        Non-ordinal state (``State.ASSESSED`` for plain grades).
    """

    code: str
    meaning: str
    grade: int
    state: State = State.ASSESSED

    @property
    def value(self) -> int:
        """Stored ``int8`` value of the code (digit value or ASCII ordinal)."""
        return _code_value(self.code)


@dataclass(frozen=True)
class FlagScheme:
    """A published flag scale as a look-up table.

    Parameters
    ----------
    name : str
        Short name used on the command line (``--scheme``).
    title : str
        Human-readable title.
    source : str
        The published source of the table.
    codes : tuple of FlagCode
        Every code of the scale.
    encode_grades : dict
        Code written for each ordinal grade 1-4.
    encode_states : dict
        Code written for each non-ordinal state; states not listed fall back to
        ``fallback``.
    fallback : str
        Code written for states the scale cannot express.
    lossy : tuple of str
        Where converting to this scale loses information.
    """

    name: str
    title: str
    source: str
    codes: tuple[FlagCode, ...]
    encode_grades: dict[int, str]
    encode_states: dict[State, str]
    fallback: str
    lossy: tuple[str, ...] = field(default_factory=tuple)

    def __post_init__(self) -> None:
        values = [c.value for c in self.codes]
        if len(set(values)) != len(values):
            raise ValueError(f"scheme {self.name}: duplicate codes")

    @property
    def values(self) -> NDArray[np.int8]:
        """Stored values of all codes, in table order."""
        return np.array([c.value for c in self.codes], dtype=np.int8)

    @property
    def meanings(self) -> list[str]:
        """CF ``flag_meanings`` tokens, in table order."""
        return [c.meaning for c in self.codes]

    @property
    def missing_code(self) -> str:
        """Code written where a value is missing."""
        return self.encode_states.get(State.MISSING, self.fallback)

    def code_for(self, value: int) -> FlagCode:
        """Return the :class:`FlagCode` whose stored value is `value`."""
        for c in self.codes:
            if c.value == value:
                return c
        raise KeyError(value)


def _code_value(code: str) -> int:
    if len(code) != 1:
        raise ValueError(f"flag codes are one character, got {code!r}")
    return int(code) if code.isdigit() else ord(code)


G = Grade
S = State

# Argo reference table 2 (measurement flag scale), Argo User's Manual v3.43.0, "Reference
# tables"; NVS collections RR2 (real time) / RD2 (delayed mode). See ../shared/reference/
# formats-and-conventions.md section 3.1. Codes 6 and 7 are "not used" and are refused on input.
ARGO = FlagScheme(
    name="argo",
    title="Argo reference table 2 (0-9)",
    source="Argo User's Manual v3.43.0, reference table 2; NVS RR2/RD2",
    codes=(
        FlagCode("0", "no_qc_performed", 0, S.NOT_EVALUATED),
        FlagCode("1", "good_data", G.GOOD),
        FlagCode("2", "probably_good_data", G.PROBABLY_GOOD),
        FlagCode("3", "probably_bad_data_potentially_adjustable", G.PROBABLY_BAD),
        FlagCode("4", "bad_data", G.BAD),
        FlagCode("5", "value_changed", 0, S.CHANGED),
        FlagCode("8", "estimated_value", 0, S.INTERPOLATED),
        FlagCode("9", "missing_value", 0, S.MISSING),
    ),
    encode_grades={1: "1", 2: "2", 3: "3", 4: "4"},
    encode_states={
        S.NOT_EVALUATED: "0",
        S.ABSENT: "0",
        S.CHANGED: "5",
        S.DESPIKED: "5",
        S.INTERPOLATED: "8",
        S.MISSING: "9",
        S.NOT_REPORTED: "9",
        S.NOT_SAMPLED: "9",
    },
    fallback="0",
    lossy=(
        "despiked (WOCE 7) becomes 5 'value changed'",
        "not reported / not sampled become 9 'missing'",
        "states with no Argo code (below detection, nominal, not calibrated, ...) become 0",
    ),
)

# IOC/IODE primary-level quality flags, IOC Manuals and Guides 54 Vol. 3 (2013), as published
# in NVS collection L34; the same 1/2/3/4/9 scale is the QARTOD flag scale (QARTOD flags
# manual v1.2, 2020). It is the three-level pass / suspect / fail scale of this project.
IOC = FlagScheme(
    name="ioc",
    title="IOC 2013 primary level / QARTOD (pass, suspect, fail)",
    source="IOC Manuals and Guides 54 Vol. 3 (2013), NVS L34; QARTOD flags manual v1.2",
    codes=(
        FlagCode("1", "pass", G.GOOD),
        FlagCode("2", "not_evaluated", 0, S.NOT_EVALUATED),
        FlagCode("3", "suspect", G.PROBABLY_BAD),
        FlagCode("4", "fail", G.BAD),
        FlagCode("9", "missing", 0, S.MISSING),
    ),
    encode_grades={1: "1", 2: "1", 3: "3", 4: "4"},
    encode_states={S.NOT_EVALUATED: "2", S.ABSENT: "2", S.MISSING: "9",
                   S.NOT_REPORTED: "9", S.NOT_SAMPLED: "9"},
    fallback="2",
    lossy=(
        "probably good (2) becomes pass (1): the scale has no 'probably good'",
        "changed, interpolated and other states become 2 'not evaluated'",
    ),
)

# WOCE CTD quality codes, WOCE Hydrographic Programme Operations Manual, as restated in the
# CCHDO WHP-Exchange format description v1.2.1 (see ../shared/reference/ sections 3.2 and 4).
# Code 8 is "not assigned for CTD data" and is refused on input.
WOCE_CTD = FlagScheme(
    name="woce_ctd",
    title="WOCE CTD quality codes",
    source="WOCE operations manual via CCHDO WHP-Exchange v1.2.1",
    codes=(
        FlagCode("1", "not_calibrated", 0, S.NOT_CALIBRATED),
        FlagCode("2", "acceptable_measurement", G.GOOD),
        FlagCode("3", "questionable_measurement", G.PROBABLY_BAD),
        FlagCode("4", "bad_measurement", G.BAD),
        FlagCode("5", "not_reported", 0, S.NOT_REPORTED),
        FlagCode("6", "interpolated_over_gap_larger_than_2_dbar", 0, S.INTERPOLATED),
        FlagCode("7", "despiked", 0, S.DESPIKED),
        FlagCode("9", "not_sampled", 0, S.NOT_SAMPLED),
    ),
    encode_grades={1: "2", 2: "2", 3: "3", 4: "4"},
    encode_states={
        S.NOT_CALIBRATED: "1",
        S.NOT_EVALUATED: "1",
        S.ABSENT: "1",
        S.NOT_REPORTED: "5",
        S.INTERPOLATED: "6",
        S.DESPIKED: "7",
        S.CHANGED: "7",
        S.MISSING: "9",
        S.NOT_SAMPLED: "9",
    },
    fallback="1",
    lossy=(
        "probably good (2) becomes 2 'acceptable': WOCE has no 'probably good'",
        "not evaluated becomes 1 'not calibrated'",
        "value changed becomes 7 'despiked'",
    ),
)

# WOCE water-sample (bottle parameter) quality codes, CCHDO Exchange Format 1.0.1 quoting the
# WOCE manual (../shared/reference/qc-standards.md section 3.2).
WOCE_SAMPLE = FlagScheme(
    name="woce_sample",
    title="WOCE water-sample quality codes",
    source="WOCE operations manual via CCHDO Exchange Format 1.0.1",
    codes=(
        FlagCode("1", "sample_drawn_no_result", 0, S.NOT_EVALUATED),
        FlagCode("2", "acceptable_measurement", G.GOOD),
        FlagCode("3", "questionable_measurement", G.PROBABLY_BAD),
        FlagCode("4", "bad_measurement", G.BAD),
        FlagCode("5", "not_reported", 0, S.NOT_REPORTED),
        FlagCode("6", "mean_of_replicates", 0, S.REPLICATE_MEAN),
        FlagCode("7", "manual_chromatographic_peak", 0, S.PEAK_MANUAL),
        FlagCode("8", "irregular_digital_peak_integration", 0, S.PEAK_IRREGULAR),
        FlagCode("9", "sample_not_drawn", 0, S.NOT_SAMPLED),
    ),
    encode_grades={1: "2", 2: "2", 3: "3", 4: "4"},
    encode_states={
        S.NOT_EVALUATED: "1",
        S.ABSENT: "1",
        S.NOT_REPORTED: "5",
        S.REPLICATE_MEAN: "6",
        S.PEAK_MANUAL: "7",
        S.PEAK_IRREGULAR: "8",
        S.NOT_SAMPLED: "9",
        S.MISSING: "9",
    },
    fallback="1",
    lossy=(
        "probably good (2) becomes 2 'acceptable'",
        "changed/interpolated and other states become 1",
    ),
)

# WOCE bottle (sampler) codes, CCHDO Exchange Format 1.0.1 quoting the WOCE manual. These
# judge the bottle, so the codes are read as quality grades of every sample it took.
WOCE_BOTTLE = FlagScheme(
    name="woce_bottle",
    title="WOCE bottle quality codes",
    source="WOCE operations manual via CCHDO Exchange Format 1.0.1",
    codes=(
        FlagCode("1", "bottle_information_unavailable", 0, S.NOT_EVALUATED),
        FlagCode("2", "no_problems_noted", G.GOOD),
        FlagCode("3", "leaking", G.PROBABLY_BAD),
        FlagCode("4", "did_not_trip_correctly", G.BAD),
        FlagCode("5", "not_reported", 0, S.NOT_REPORTED),
        FlagCode("6", "gerard_niskin_discrepancy", G.PROBABLY_BAD),
        FlagCode("7", "unknown_problem", G.PROBABLY_BAD),
        FlagCode("8", "pair_did_not_trip_correctly", G.BAD),
        FlagCode("9", "samples_not_drawn", 0, S.NOT_SAMPLED),
    ),
    encode_grades={1: "2", 2: "2", 3: "3", 4: "4"},
    encode_states={
        S.NOT_EVALUATED: "1",
        S.ABSENT: "1",
        S.NOT_REPORTED: "5",
        S.NOT_SAMPLED: "9",
        S.MISSING: "9",
    },
    fallback="1",
    lossy=(
        "probably good (2) becomes 2 'no problems noted'",
        "codes 6 and 7 both read as probably bad and are written back as 3; 8 reads as bad "
        "and is written back as 4",
    ),
)

# SeaDataNet measurand qualifier flags, NVS collection L20 (see ../shared/reference/
# qc-standards.md section 3.1). 'A' wording is from memory in the reference sheet.
L20 = FlagScheme(
    name="l20",
    title="SeaDataNet L20 measurand qualifier flags",
    source="SeaDataNet, NVS collection L20",
    codes=(
        FlagCode("0", "no_quality_control", 0, S.NOT_EVALUATED),
        FlagCode("1", "good_value", G.GOOD),
        FlagCode("2", "probably_good_value", G.PROBABLY_GOOD),
        FlagCode("3", "probably_bad_value", G.PROBABLY_BAD),
        FlagCode("4", "bad_value", G.BAD),
        FlagCode("5", "changed_value", 0, S.CHANGED),
        FlagCode("6", "value_below_detection", 0, S.BELOW_DETECTION),
        FlagCode("7", "value_in_excess", 0, S.IN_EXCESS),
        FlagCode("8", "interpolated_value", 0, S.INTERPOLATED),
        FlagCode("9", "missing_value", 0, S.MISSING),
        FlagCode("A", "value_phenomenon_uncertain", 0, S.UNCERTAIN),
        FlagCode("B", "nominal_value", 0, S.NOMINAL),
        FlagCode("Q", "value_below_limit_of_quantification", 0, S.BELOW_QUANTIFICATION),
    ),
    encode_grades={1: "1", 2: "2", 3: "3", 4: "4"},
    encode_states={
        S.NOT_EVALUATED: "0",
        S.ABSENT: "0",
        S.NOT_CALIBRATED: "0",
        S.CHANGED: "5",
        S.DESPIKED: "5",
        S.BELOW_DETECTION: "6",
        S.IN_EXCESS: "7",
        S.INTERPOLATED: "8",
        S.MISSING: "9",
        S.NOT_REPORTED: "9",
        S.NOT_SAMPLED: "9",
        S.UNCERTAIN: "A",
        S.NOMINAL: "B",
        S.BELOW_QUANTIFICATION: "Q",
    },
    fallback="0",
    lossy=("despiked becomes 5 'changed'; not calibrated becomes 0 'no quality control'",),
)

SCHEMES: dict[str, FlagScheme] = {s.name: s for s in (ARGO, IOC, WOCE_CTD, WOCE_SAMPLE,
                                                      WOCE_BOTTLE, L20)}
_ALIASES = {"qartod": "ioc", "woce": "woce_ctd", "seadatanet": "l20", "argo_rt": "argo"}


def get_scheme(scheme: str | FlagScheme) -> FlagScheme:
    """Return the flag scheme called `scheme`.

    Parameters
    ----------
    scheme : str or FlagScheme
        One of ``argo``, ``ioc`` (alias ``qartod``), ``woce_ctd``, ``woce_sample``,
        ``woce_bottle``, ``l20`` (alias ``seadatanet``), or a scheme object.

    Returns
    -------
    FlagScheme

    Raises
    ------
    QCFlagError
        If the name is unknown.
    """
    if isinstance(scheme, FlagScheme):
        return scheme
    key = _ALIASES.get(str(scheme).lower(), str(scheme).lower())
    try:
        return SCHEMES[key]
    except KeyError:
        known = ", ".join(sorted(SCHEMES))
        raise QCFlagError(f"unknown flag scheme {scheme!r}; use one of {known}") from None


def _lut(scheme: FlagScheme) -> tuple[NDArray[np.int8], NDArray[np.int8], NDArray[np.bool_]]:
    # index = stored code + 1 (so NO_FLAG = -1 sits at 0); int8 codes are < 128
    grade = np.zeros(129, dtype=np.int8)
    state = np.full(129, State.ABSENT, dtype=np.int8)
    known = np.zeros(129, dtype=bool)
    known[0] = True
    for c in scheme.codes:
        grade[c.value + 1] = c.grade
        state[c.value + 1] = c.state
        known[c.value + 1] = True
    return grade, state, known


_LUTS = {name: _lut(s) for name, s in SCHEMES.items()}


def decode(
    codes: ArrayLike, scheme: str | FlagScheme, *, where: str = "flags"
) -> tuple[NDArray[np.int8], NDArray[np.int8]]:
    """Convert stored flag codes of `scheme` to (grade, state).

    Parameters
    ----------
    codes : array-like of int8
        Stored codes (see module docstring); ``NO_FLAG`` marks no flag.
    scheme : str or FlagScheme
        The scale the codes are written in.
    where : str, default="flags"
        Names the variable in error messages.

    Returns
    -------
    grade : ndarray of int8
        Ordinal grade 1-4, or 0 where the code is not on the order.
    state : ndarray of int8
        :class:`State` values.

    Raises
    ------
    QCFlagError
        If a code does not belong to the scheme.

    Examples
    --------
    >>> g, s = decode([1, 4, 9, -1], "argo")
    >>> g.tolist(), [State(v).name for v in s]
    ([1, 4, 0, 0], ['ASSESSED', 'ASSESSED', 'MISSING', 'ABSENT'])
    """
    sch = get_scheme(scheme)
    lut = _LUTS.get(sch.name) or _lut(sch)
    idx = np.asarray(codes, dtype=np.int16) + 1
    bad = (idx < 0) | (idx > 128)
    if not bad.any():
        bad = ~lut[2][idx]
    if bad.any():
        first = int(np.asarray(codes).ravel()[np.flatnonzero(bad.ravel())[0]])
        shown = chr(first) if first >= 65 else str(first)
        raise QCFlagError(
            f"{where}: flag code {shown!r} is not in the {sch.title} scale "
            f"(valid: {' '.join(c.code for c in sch.codes)}); give the right --scheme"
        )
    return lut[0][idx], lut[1][idx]


def encode(
    grade: ArrayLike, state: ArrayLike | None, scheme: str | FlagScheme
) -> NDArray[np.int8]:
    """Convert (grade, state) to stored codes of `scheme`.

    Levels with ``state == State.ASSESSED`` are written from their grade; other levels from
    their state (falling back to the scheme's fallback code where it has no equivalent).

    Parameters
    ----------
    grade : array-like of int
        Ordinal grade 1-4 (0 where there is none).
    state : array-like of int or None
        :class:`State` values; None means every level is assessed.
    scheme : str or FlagScheme
        Target scale.

    Returns
    -------
    ndarray of int8
        Stored codes.

    Examples
    --------
    >>> encode([1, 2, 3, 4], None, "woce_ctd").tolist()
    [2, 2, 3, 4]
    """
    sch = get_scheme(scheme)
    g = np.asarray(grade, dtype=np.int16)
    by_grade = np.full(5, _code_value(sch.fallback), dtype=np.int8)
    for k, code in sch.encode_grades.items():
        by_grade[k] = _code_value(code)
    out = by_grade[np.clip(g, 0, 4)]
    if state is None:
        return out
    st = np.asarray(state, dtype=np.int16)
    by_state = np.full(len(State), _code_value(sch.fallback), dtype=np.int8)
    for s, code in sch.encode_states.items():
        by_state[s] = _code_value(code)
    not_assessed = st != State.ASSESSED
    out = np.where(not_assessed, by_state[np.clip(st, 0, len(State) - 1)], out)
    return out.astype(np.int8)


def parse_codes(
    values: ArrayLike, scheme: str | FlagScheme, *, where: str = "flags"
) -> NDArray[np.int8]:
    """Parse flag codes as read from a file (strings, bytes or numbers) to stored codes.

    Blank strings, NaN and masked values become :data:`NO_FLAG`.

    Parameters
    ----------
    values : array-like
        Codes as read: ``"1"``, ``b"4"``, ``4.0``, ``"A"``, ``" "``, NaN.
    scheme : str or FlagScheme
        Scale the codes belong to (validated).
    where : str, default="flags"
        Names the file and variable in error messages.

    Returns
    -------
    ndarray of int8

    Raises
    ------
    QCFlagError
        On a code that is not a flag of the scheme.
    """
    arr = np.asarray(values)
    if arr.dtype.kind in "iu":
        if arr.size and (arr.min() < -1 or arr.max() > 127):
            bad = arr[(arr < -1) | (arr > 127)][0]
            raise QCFlagError(f"{where}: flag code {str(bad)!r} is not a flag code")
        out = arr.astype(np.int8)
    elif arr.dtype.kind == "f":
        finite = np.isfinite(arr)
        if (finite & (arr != np.round(arr))).any() or (finite & ((arr < -1) | (arr > 127))).any():
            bad = arr[finite & ((arr != np.round(arr)) | (arr < -1) | (arr > 127))][0]
            raise QCFlagError(f"{where}: flag code {str(bad)!r} is not a flag code")
        out = np.where(finite, arr, NO_FLAG).astype(np.int8)
    else:
        if arr.dtype.kind == "S":
            arr = np.char.decode(arr, "ascii", errors="replace")
        s = np.char.strip(arr.astype(str))
        s = np.where(np.isin(s, ["", "nan", "NaN", "--", "None"]), "-1", s)
        out = np.empty(s.shape, dtype=np.int8)
        digit = np.char.isdigit(s) | (s == "-1")
        if digit.any():
            try:
                nums = s[digit].astype(np.int64)
            except ValueError:
                nums = np.array([int(float(x)) for x in s[digit]])
            if nums.size and (nums.max() > 127):
                raise QCFlagError(f"{where}: flag code {int(nums.max())} is not a flag code")
            out[digit] = nums
        other = ~digit
        if other.any():
            o = s[other]
            floaty = np.char.endswith(o, ".0") & np.char.isdigit(np.char.replace(o, ".0", ""))
            single = np.char.str_len(o) == 1
            if not (single | floaty).all():
                bad = o[~(single | floaty)][0]
                raise QCFlagError(f"{where}: flag code {str(bad)!r} is not a flag code")
            vals = np.where(
                floaty,
                np.char.replace(o, ".0", "").astype(object),
                o.astype(object),
            )
            out[other] = [int(v) if floaty[i] else ord(v) for i, v in enumerate(vals)]
    decode(out, scheme, where=where)  # validates every code
    return out


def format_codes(codes: ArrayLike) -> NDArray[np.str_]:
    """Format stored codes as the one-character strings written in files ("" for no flag).

    Examples
    --------
    >>> format_codes([1, 65, -1]).tolist()
    ['1', 'A', '']
    """
    c = np.asarray(codes, dtype=np.int16)
    table = np.array([""] + [str(i) if i < 10 else chr(i) for i in range(128)], dtype="<U1")
    return table[np.clip(c, -1, 127) + 1]


_PROFILE_LETTERS = np.array([" ", "A", "B", "C", "D", "E", "F"])


def profile_quality(
    grade: ArrayLike, state: ArrayLike, offsets: ArrayLike
) -> tuple[NDArray[np.float64], NDArray[np.str_]]:
    """Profile-level quality from the share of good levels (Argo reference table 2a).

    Good levels are grades 1 and 2 and the states "changed" and "interpolated" (Argo flags
    1, 2, 5, 8); bad levels are grades 3 and 4; every other state is left out of the count.

    Parameters
    ----------
    grade, state : array-like of shape (n_levels,)
        Per-level grade and state.
    offsets : array-like of shape (n_profiles + 1,)
        Profile start offsets.

    Returns
    -------
    percent_good : ndarray of shape (n_profiles,)
        N, the percentage of good levels (NaN where no level counts).
    letter : ndarray of str, shape (n_profiles,)
        ``A`` (N = 100), ``B`` (75 <= N < 100), ``C`` (50 <= N < 75), ``D`` (25 <= N < 50),
        ``E`` (0 < N < 25), ``F`` (N = 0), blank where no level counts.

    Examples
    --------
    Argo User's Manual reference table 2a worked example: 45 levels flagged 1, 5 flagged 2,
    7 flagged 4 and 3 flagged 9 give N = 87.7 %, grade B.

    >>> g = [1] * 45 + [2] * 5 + [4] * 7 + [0] * 3
    >>> s = [0] * 57 + [int(State.MISSING)] * 3
    >>> n, letter = profile_quality(g, s, [0, 60])
    >>> round(float(n[0]), 1), str(letter[0])
    (87.7, 'B')
    """
    g = np.asarray(grade)
    s = np.asarray(state)
    off = np.asarray(offsets, dtype=np.int64)
    good = ((s == State.ASSESSED) & ((g == 1) | (g == 2))) | np.isin(
        s, [State.CHANGED, State.INTERPOLATED]
    )
    bad = (s == State.ASSESSED) & ((g == 3) | (g == 4))
    csum_good = np.concatenate([[0], np.cumsum(good)])
    csum_bad = np.concatenate([[0], np.cumsum(bad)])
    n_good = csum_good[off[1:]] - csum_good[off[:-1]]
    n_bad = csum_bad[off[1:]] - csum_bad[off[:-1]]
    total = n_good + n_bad
    with np.errstate(invalid="ignore", divide="ignore"):
        pct = np.where(total > 0, 100.0 * n_good / np.maximum(total, 1), np.nan)
    idx = np.select(
        [total == 0, pct >= 100, pct >= 75, pct >= 50, pct >= 25, pct > 0],
        [0, 1, 2, 3, 4, 5],
        default=6,
    )
    return pct, _PROFILE_LETTERS[idx]
