"""Spike and gradient checks (Argo real-time tests 9 and 11).

Notation as in the Argo QC manual: V1, V2, V3 are consecutive *usable* values of one
variable at increasing pressure in one profile, and V2 is the value tested. Usable means
finite and not already graded bad by an earlier check (Argo flag policy, ARGO-QC §2.1.4).
"Exceeds" is strictly greater. Thresholds depend on the pressure of V2: the shallow limit
applies for PRES < breakpoint, the deep limit for PRES >= breakpoint.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import TYPE_CHECKING

import numpy as np

from qcflag.checks._ragged import (
    grade_levels,
    neighbour_map,
    next_values,
    prev_values,
    shallower_than,
    usable,
)
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


def _by_pressure(batch: ProfileBatch, variable: str, exclude: NDArray[np.bool_] | None,
                 shallow_limit: float, deep_limit: float, breakpoint: float,
                 statistic: Callable[[NDArray[np.float64], NDArray[np.float64],
                                      NDArray[np.float64]], NDArray[np.float64]]
                 ) -> CheckResult:
    """Evaluate ``statistic(V2, V1, V3)`` and grade it by the limit of the level's pressure.

    Runs in cache-sized blocks of levels (see :func:`neighbour_map`).
    """
    v = batch.values(variable)
    stat = np.empty(v.size)
    grade = np.empty(v.size, dtype=np.int8)
    shallow, has_p = shallower_than(batch, breakpoint)

    def blockwise(levels: slice | NDArray[np.int64], v1: NDArray[np.float64],
                  v3: NDArray[np.float64]) -> None:
        st = statistic(v[levels], v1, v3)
        fails = np.where(shallow[levels], st > shallow_limit, st > deep_limit)
        stat[levels] = st
        grade[levels] = grade_levels(np.logical_and(st == st, has_p[levels]), fails)

    neighbour_map(batch, v, usable(v, exclude), blockwise)
    return CheckResult(stat, grade)


def _gradient_value(v2: NDArray[np.float64], v1: NDArray[np.float64], v3: NDArray[np.float64]
                    ) -> NDArray[np.float64]:
    """``|V2 - (V3 + V1)/2|`` (new array; the inputs are not modified)."""
    stat = np.add(v3, v1)
    stat /= 2
    np.subtract(v2, stat, out=stat)
    np.abs(stat, out=stat)
    return stat


def _spike_value(v2: NDArray[np.float64], v1: NDArray[np.float64], v3: NDArray[np.float64]
                 ) -> NDArray[np.float64]:
    """``|V2 - (V3 + V1)/2| - |(V3 - V1)/2|`` (new array; the inputs are not modified)."""
    stat = _gradient_value(v2, v1, v3)
    half = np.subtract(v3, v1)
    half /= 2
    np.abs(half, out=half)
    stat -= half
    return stat


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
    return _by_pressure(batch, variable, exclude, shallow_limit, deep_limit, breakpoint,
                        _spike_value)


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
    return _by_pressure(batch, variable, exclude, shallow_limit, deep_limit, breakpoint,
                        _gradient_value)
