"""Spike and gradient checks (Argo real-time tests 9 and 11).

Notation as in the Argo QC manual: V1, V2, V3 are consecutive *usable* values of one
variable at increasing pressure in one profile, and V2 is the value tested. Usable means
finite and not already graded bad by an earlier check (Argo flag policy, ARGO-QC §2.1.4).
"Exceeds" is strictly greater. Thresholds depend on the pressure of V2: the shallow limit
applies for PRES < breakpoint, the deep limit for PRES >= breakpoint.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np

from qcflag.checks._ragged import grade_levels, next_values, prev_values, shallower_than, usable
from qcflag.checks.base import CheckResult

if TYPE_CHECKING:
    from numpy.typing import NDArray

    from qcflag.profiles import ProfileBatch

__all__ = ["gradient", "neighbours", "spike"]


def neighbours(
    batch: ProfileBatch, values: NDArray[np.float64], exclude: NDArray[np.bool_] | None = None
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Previous and next usable values (V1, V3) of every level, NaN where there is none.

    Parameters
    ----------
    batch : ProfileBatch
        The batch.
    values : ndarray of float64, shape (n_levels,)
        Level values.
    exclude : ndarray of bool, optional
        Levels not to use as neighbours.

    Returns
    -------
    v1, v3 : ndarray of float64, shape (n_levels,)
    """
    ok = usable(values, exclude)
    return prev_values(batch, values, ok), next_values(batch, values, ok)


def _grade_by_pressure(batch: ProfileBatch, stat: NDArray[np.float64], shallow_limit: float,
                       deep_limit: float, breakpoint: float) -> NDArray[np.int8]:
    shallow, has_p = shallower_than(batch, breakpoint)
    fails = np.where(shallow, stat > shallow_limit, stat > deep_limit)
    return grade_levels(np.logical_and(stat == stat, has_p), fails)


def spike(
    batch: ProfileBatch,
    *,
    variable: str,
    shallow_limit: float,
    deep_limit: float,
    breakpoint: float = 500.0,
    exclude: NDArray[np.bool_] | None = None,
) -> CheckResult:
    """Argo spike test: ``|V2 - (V3 + V1)/2| - |(V3 - V1)/2|``.

    Parameters
    ----------
    batch : ProfileBatch
        Profiles to check.
    variable : {"temperature", "salinity"}
        Variable to check.
    shallow_limit, deep_limit : float
        V2 is graded 4 where the test value exceeds the limit for its pressure (Argo: TEMP
        6.0 / 2.0 degC, PSAL 0.9 / 0.3), in the variable's units.
    breakpoint : float, default=500.0
        Pressure, dbar, from which `deep_limit` applies.
    exclude : ndarray of bool, optional
        Levels already graded bad, not used as V1 or V3.

    Returns
    -------
    CheckResult
        Statistic: the test value in the variable's units (a step gives 0: it is not a
        spike); NaN at the ends of a profile and where V2 is missing.
    """
    v = batch.values(variable)
    v1, v3 = neighbours(batch, v, exclude)
    # |V2 - (V3 + V1)/2| - |(V3 - V1)/2|, in place in the neighbour arrays (same operations)
    stat = np.add(v3, v1)
    stat /= 2
    np.subtract(v, stat, out=stat)
    np.abs(stat, out=stat)
    half = np.subtract(v3, v1, out=v3)
    half /= 2
    np.abs(half, out=half)
    stat -= half
    return CheckResult(stat, _grade_by_pressure(batch, stat, shallow_limit, deep_limit,
                                                breakpoint))


def gradient(
    batch: ProfileBatch,
    *,
    variable: str,
    shallow_limit: float,
    deep_limit: float,
    breakpoint: float = 500.0,
    exclude: NDArray[np.bool_] | None = None,
) -> CheckResult:
    """Argo gradient test: ``|V2 - (V3 + V1)/2|`` (declared obsolete by Argo in 2019).

    Parameters
    ----------
    batch : ProfileBatch
        Profiles to check.
    variable : {"temperature", "salinity"}
        Variable to check.
    shallow_limit, deep_limit : float
        V2 is graded 4 where the test value exceeds the limit for its pressure (former Argo
        values: TEMP 9.0 / 3.0 degC, PSAL 1.5 / 0.5), in the variable's units.
    breakpoint : float, default=500.0
        Pressure, dbar, from which `deep_limit` applies.
    exclude : ndarray of bool, optional
        Levels already graded bad, not used as V1 or V3.

    Returns
    -------
    CheckResult
        Statistic: the test value in the variable's units; NaN at the ends of a profile.
    """
    v = batch.values(variable)
    v1, v3 = neighbours(batch, v, exclude)
    stat = np.add(v3, v1, out=v3)  # |V2 - (V3 + V1)/2|, in place (same operations)
    stat /= 2
    np.subtract(v, stat, out=stat)
    np.abs(stat, out=stat)
    return CheckResult(stat, _grade_by_pressure(batch, stat, shallow_limit, deep_limit,
                                                breakpoint))
