"""Grade colours and marker shapes used in every report figure and table.

The palette is taken from the eight-colour set of Okabe & Ito (2008), *Color Universal
Design (CUD): how to make figures and presentations that are friendly to colorblind people*
(J*FLY, https://jfly.uni-koeln.de/color/), which was designed to stay distinguishable under
protanopia, deuteranopia and tritanopia. Grades run along the blue--orange axis, the axis the
common red--green deficiencies preserve: the two "good" grades are blues (dark then light) and
the two "bad" grades are orange then vermillion, so the order good -> bad reads as cool ->
warm and lightness alone keeps 1 apart from 2 and 3 apart from 4. Levels without an ordinal
grade are neutral grey.

Colour is never the only cue: each grade also has its own marker shape (filled circle,
diamond, triangle, cross), and the HTML tables print a matching text symbol, so a page
printed in greyscale or read by someone who cannot tell the colours apart still works.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from qcflag.schemes import Grade

__all__ = ["GRADE_STYLES", "NO_GRADE", "GradeStyle", "grade_colours", "grade_style"]

NO_GRADE = 0
"""Category used for levels that carry no ordinal grade (missing, absent, other states)."""


@dataclass(frozen=True)
class GradeStyle:
    """How one grade is drawn.

    Parameters
    ----------
    grade : int
        Ordinal grade 1-4, or 0 for "no grade".
    label : str
        Plain-language name shown in legends and tables.
    colour : str
        Hex RGB colour (Okabe-Ito).
    marker : str
        Matplotlib marker code.
    symbol : str
        Text symbol of the same shape, used in HTML tables.
    """

    grade: int
    label: str
    colour: str
    marker: str
    symbol: str


GRADE_STYLES: dict[int, GradeStyle] = {
    Grade.GOOD: GradeStyle(1, "good", "#0072B2", "o", "\u25cf"),  # blue, filled circle
    Grade.PROBABLY_GOOD: GradeStyle(2, "probably good", "#56B4E9", "D", "\u25c6"),  # sky blue
    Grade.PROBABLY_BAD: GradeStyle(3, "probably bad", "#E69F00", "^", "\u25b2"),  # orange
    Grade.BAD: GradeStyle(4, "bad", "#D55E00", "X", "\u2716"),  # vermillion, filled cross
    NO_GRADE: GradeStyle(0, "no grade", "#999999", ".", "\u00b7"),  # neutral grey dot
}
"""Style of each grade, keyed by the grade (0 = no ordinal grade)."""

_COLOUR_TABLE = np.array([GRADE_STYLES[g].colour for g in range(5)])


def grade_style(grade: int) -> GradeStyle:
    """Return the style of `grade` (anything outside 1-4 is drawn as "no grade")."""
    return GRADE_STYLES.get(int(grade), GRADE_STYLES[NO_GRADE])


def grade_colours(grades: np.ndarray) -> np.ndarray:
    """Map an array of grades to hex colours, vectorised (values outside 1-4 -> grey).

    Parameters
    ----------
    grades : ndarray of int
        Grades 0-4.

    Returns
    -------
    ndarray of str
        Hex colour per element.

    Examples
    --------
    >>> grade_colours(np.array([1, 4, 0])).tolist()
    ['#0072B2', '#D55E00', '#999999']
    """
    g = np.asarray(grades, dtype=np.int64)
    g = np.where((g >= 1) & (g <= 4), g, 0)
    return _COLOUR_TABLE[g]
