"""The contract every check follows."""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np

if TYPE_CHECKING:
    from numpy.typing import NDArray

__all__ = ["CheckResult"]


@dataclass(frozen=True)
class CheckResult:
    """Outcome of one check on one variable over a whole batch.

    Parameters
    ----------
    statistic : ndarray of float64, shape (n_levels,)
        The continuous test statistic (a feature for learning); NaN where the check cannot
        apply.
    grade : ndarray of int8, shape (n_levels,)
        The grade the published rule gives: 1 pass, 3 probably bad, 4 bad; 0 where the check
        does not apply.
    """

    statistic: NDArray[np.float64]
    grade: NDArray[np.int8]

    def __post_init__(self) -> None:
        s = np.asarray(self.statistic, dtype=np.float64)
        g = np.asarray(self.grade, dtype=np.int8)
        if s.shape != g.shape or s.ndim != 1:
            raise ValueError("statistic and grade must be 1-D and of equal length")
        object.__setattr__(self, "statistic", s)
        object.__setattr__(self, "grade", g)

    @property
    def fired(self) -> NDArray[np.bool_]:
        """True where the rule gives probably bad or bad."""
        return self.grade >= 3


@dataclass
class CheckTable:
    """Results of all configured checks on one batch.

    Parameters
    ----------
    results : dict
        ``(check_name, variable) -> CheckResult``; `variable` is ``"temperature"``,
        ``"salinity"`` or ``"pressure"``. A check that judges several variables (pressure
        increasing, density inversion) appears once per variable it flags.
    n_levels : int
        Number of levels of the batch.
    """

    results: dict[tuple[str, str], CheckResult]
    n_levels: int

    def checks_for(self, variable: str) -> list[str]:
        """Names of the checks that judged `variable`, in run order."""
        return [c for (c, v) in self.results if v == variable]

    def verdict(self, variable: str) -> NDArray[np.int8]:
        """Worst rule grade per level for `variable` (1 where no check fired or applied).

        Grades combine as the maximum, so no check can lower a grade another set (the Argo
        flag application policy, Argo QC manual section 2.1.4, via ../shared/reference/).
        """
        out = np.ones(self.n_levels, dtype=np.int8)
        for (_, v), r in self.results.items():
            if v == variable:
                np.maximum(out, r.grade, out=out)
        return out

    def fired_mask(self, variable: str) -> tuple[list[str], NDArray[np.int64]]:
        """Bit mask per level of the checks that gave grade >= 3; bit i is ``names[i]``."""
        names = self.checks_for(variable)
        mask = np.zeros(self.n_levels, dtype=np.int64)
        for i, name in enumerate(names):  # few levels fire: set the bit at those only
            hit = np.flatnonzero(self.results[(name, variable)].grade >= 3)
            mask[hit] |= np.int64(1) << i
        return names, mask

    def statistics(self) -> dict[str, NDArray[np.float64]]:
        """Every test statistic as ``{"<variable>_<check>": array}``."""
        return {f"{v}_{c}": r.statistic for (c, v), r in self.results.items()}
