"""Per-cruise HTML reports: station map, graded profiles, T-S diagram, tables, JSON summary.

Automated flags assist expert QC and do not replace it; every page says so and defers to
the data programme's own standards.
"""

from __future__ import annotations

from qcflag.report.html import build_cruise_page, write_reports
from qcflag.report.palette import GRADE_STYLES, GradeStyle, grade_colours
from qcflag.report.summary import CAUTION, confusion_matrix, flag_counts, headline

__all__ = [
    "CAUTION",
    "GRADE_STYLES",
    "GradeStyle",
    "build_cruise_page",
    "confusion_matrix",
    "flag_counts",
    "grade_colours",
    "headline",
    "write_reports",
]
