"""Physically motivated checks, each a pure vectorised function over a ProfileBatch.

Each check is ``f(batch, *, variable, **params) -> CheckResult`` (or a dict of results
keyed by variable when it judges several variables). The registry
(:mod:`qcflag.checks.registry`) maps the stable check names used in rule files to them.
"""

from __future__ import annotations

from qcflag.checks.base import CheckResult, CheckTable
from qcflag.checks.density import density_inversion
from qcflag.checks.pressure import pressure_increasing
from qcflag.checks.ranges import global_range, regional_range
from qcflag.checks.registry import (
    CHECKS,
    CheckSpec,
    available_checks,
    get_check,
    register_check,
)
from qcflag.checks.rollover import digit_rollover
from qcflag.checks.shape import near_bottom, near_surface, robust_z, second_difference
from qcflag.checks.spike import gradient, spike
from qcflag.checks.stuck import flat_line, stuck_value
from qcflag.checks.track import impossible_speed

__all__ = [
    "CHECKS",
    "CheckResult",
    "CheckSpec",
    "CheckTable",
    "available_checks",
    "density_inversion",
    "digit_rollover",
    "flat_line",
    "get_check",
    "global_range",
    "gradient",
    "impossible_speed",
    "near_bottom",
    "near_surface",
    "pressure_increasing",
    "regional_range",
    "register_check",
    "robust_z",
    "second_difference",
    "spike",
    "stuck_value",
]
