"""The registry of checks: names, functions, the variables they judge and their parameters.

Rule files name checks by their stable name (``spike``, ``density_inversion`` ...); the
registry maps that name to a :class:`CheckSpec`, which also says which parameters a rule
step may give and of what kind, so that a rule file is validated before anything runs.

Third-party checks are discovered through the ``qcflag.checks`` entry-point group: an entry
point may load a :class:`CheckSpec` or a plain check function (then registered under the
entry point's name, judging temperature and salinity, with any keyword parameters). The
checks of the reference-data modules (climatology, position) and entry points are loaded
lazily, once, the first time the registry is consulted through :func:`get_check` or
:func:`available_checks`.
"""

from __future__ import annotations

import functools
import importlib
import importlib.metadata
import inspect
import math
import warnings
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from typing import Any

from qcflag.checks import density, pressure, ranges, rollover, shape, spike, stuck, track
from qcflag.checks.base import CheckResult

__all__ = [
    "CHECKS",
    "PARAM_KINDS",
    "CheckSpec",
    "ParamError",
    "available_checks",
    "get_check",
    "register_check",
    "validate_params",
]

PARAM_KINDS: dict[str, str] = {
    "float": "a number",
    "float+": "a number >= 0",
    "int+": "an integer >= 1",
    "bool": "true or false",
    "str": "a string",
    "variables": 'a list of variable names ("pressure", "temperature", "salinity")',
    "regions": "a list of regions, each with polygon = [[lat, lon], ...] and limits",
}
"""Kinds of check parameters a rule file may set, and how they are described in errors."""

_VARIABLES = ("pressure", "temperature", "salinity")
_REGION_KEYS = {"name", "polygon", "minimum", "maximum", "source"}

CheckFunc = Callable[..., "CheckResult | dict[str, CheckResult]"]


@dataclass(frozen=True)
class CheckSpec:
    """Everything the rule loader needs to know about one check.

    Parameters
    ----------
    name : str
        Stable name, used in rule files, reasons and feature names.
    func : callable
        ``func(batch, *, variable, **params) -> CheckResult | dict[str, CheckResult]``.
    variables : tuple of str
        Variables a rule step may apply the check to.
    judges : tuple of str or None
        Variables the check returns results for whatever the step's variable (multi-variable
        checks such as density inversion); None means just the step's variable. A step of a
        multi-variable check may leave out ``variable`` (the first of `variables` is used).
    verdict : bool
        False for statistic-only checks (grade 0 everywhere).
    params : mapping of str to str, or None
        Allowed parameters and their kind (a key of :data:`PARAM_KINDS`); None accepts any
        keyword and leaves validation to the function (plug-ins).
    required : tuple of str
        Parameters a rule step must give.
    neighbours_from : tuple of str or None
        None if the check takes no ``exclude`` argument. Otherwise the check is passed
        ``exclude``, the levels already graded 4 in these variables (empty tuple: the step's
        variable), and does not use them as neighbours (Argo flag policy).
    description : str
        One line for listings.
    """

    name: str
    func: CheckFunc
    variables: tuple[str, ...] = ("temperature", "salinity")
    judges: tuple[str, ...] | None = None
    verdict: bool = True
    params: Mapping[str, str] | None = None
    required: tuple[str, ...] = ()
    neighbours_from: tuple[str, ...] | None = None
    description: str = ""


class ParamError(ValueError):
    """A rule step gives a parameter a check does not take, or a bad value.

    Parameters
    ----------
    key : str
        The offending parameter (used to find its line in the rule file).
    message : str
        What is wrong and what is expected.
    """

    def __init__(self, key: str, message: str) -> None:
        self.key = key
        super().__init__(message)


_TS = ("temperature", "salinity")
_LIMITS = {"shallow_limit": "float+", "deep_limit": "float+", "breakpoint": "float"}

CHECKS: dict[str, CheckSpec] = {
    s.name: s
    for s in (
        CheckSpec("impossible_speed", track.impossible_speed, _TS, judges=_TS,
                  params={"float_max_speed": "float+", "ship_max_speed": "float+",
                          "level_grade": "int+"},
                  description="fix needing an impossible speed on its track (Argo test 5)"),
        CheckSpec("global_range", ranges.global_range, _VARIABLES,
                  params={"minimum": "float", "maximum": "float",
                          "suspect_at_or_below": "float", "also_flag": "variables"},
                  description="value outside fixed limits (Argo test 6)"),
        CheckSpec("regional_range", ranges.regional_range, _TS,
                  params={"regions": "regions"}, required=("regions",),
                  description="value outside the limits of its region (Argo test 7)"),
        CheckSpec("pressure_increasing", pressure.pressure_increasing, ("pressure",),
                  judges=_VARIABLES, params={}, neighbours_from=("pressure",),
                  description="pressure not above every pressure before it (Argo test 8)"),
        CheckSpec("spike", spike.spike, _TS, params=_LIMITS,
                  required=("shallow_limit", "deep_limit"), neighbours_from=(),
                  description="Argo spike test value (test 9)"),
        CheckSpec("gradient", spike.gradient, _TS, params=_LIMITS,
                  required=("shallow_limit", "deep_limit"), neighbours_from=(),
                  description="Argo gradient test value (test 11, obsolete since 2019)"),
        CheckSpec("digit_rollover", rollover.digit_rollover, _TS, params={"limit": "float+"},
                  required=("limit",), neighbours_from=(),
                  description="jump between adjacent levels (Argo test 12)"),
        CheckSpec("stuck_value", stuck.stuck_value, _TS, params={"min_levels": "int+"},
                  neighbours_from=(),
                  description="whole profile identical (Argo test 13)"),
        CheckSpec("flat_line", stuck.flat_line, _TS,
                  params={"eps": "float+", "suspect_count": "int+", "fail_count": "int+"},
                  neighbours_from=(),
                  description="run of repeated values (QARTOD flat line)"),
        CheckSpec("density_inversion", density.density_inversion, _TS, judges=_TS,
                  params={"threshold": "float+"}, neighbours_from=_TS,
                  description="potential density decreasing with depth (Argo test 14)"),
        CheckSpec("robust_z", shape.robust_z, _TS, verdict=False,
                  params={"half_window": "int+", "min_scale": "float+"}, neighbours_from=(),
                  description="moving-window robust z-score (statistic only)"),
        CheckSpec("second_difference", shape.second_difference, _TS, verdict=False,
                  params={}, neighbours_from=(),
                  description="second difference over usable neighbours (statistic only)"),
        CheckSpec("near_surface", shape.near_surface, _TS, verdict=False, params={},
                  description="distance below the profile's top, dbar (statistic only)"),
        CheckSpec("near_bottom", shape.near_bottom, _TS, verdict=False, params={},
                  description="distance above the profile's bottom, dbar (statistic only)"),
    )
}
"""Registered checks by name. Use :func:`get_check` to include lazily loaded ones."""

# checks provided by the reference-data modules (written by another engineer; imported
# lazily inside a try so that a missing module never breaks ``import qcflag.checks``):
# (module, function names to try, check name, variables, judges, params)
_REFERENCE_CHECKS: tuple[tuple[str, tuple[str, ...], str, tuple[str, ...],
                         tuple[str, ...] | None, dict[str, str]], ...] = (
    ("qcflag.checks.climatology", ("climatology", "climatology_anomaly"), "climatology",
     _TS, None, {"threshold": "float+"}),
    ("qcflag.checks.position", ("position",), "position", _VARIABLES, _VARIABLES, {}),
    ("qcflag.checks.position", ("date",), "date", _VARIABLES, _VARIABLES,
     {"earliest": "str", "now": "str"}),
    ("qcflag.checks.position", ("on_land",), "on_land", _VARIABLES, _VARIABLES,
     {"method": "str", "min_depth": "float+"}),
    ("qcflag.checks.position", ("below_seafloor",), "below_seafloor", _VARIABLES,
     _VARIABLES, {"tolerance": "float+", "method": "str"}),
)
_loaded = False


def register_check(
    spec_or_name: CheckSpec | str,
    func: CheckFunc | None = None,
    *,
    replace: bool = False,
    **fields: Any,
) -> CheckSpec:
    """Add a check to the registry.

    Parameters
    ----------
    spec_or_name : CheckSpec or str
        A complete spec, or the name of the check.
    func : callable, optional
        The check function, when `spec_or_name` is a name.
    replace : bool, default=False
        Allow replacing a check of the same name.
    **fields
        Other :class:`CheckSpec` fields when `spec_or_name` is a name.

    Returns
    -------
    CheckSpec
        The registered spec.

    Raises
    ------
    ValueError
        If the name is taken (and `replace` is false) or no function is given.
    """
    if isinstance(spec_or_name, CheckSpec):
        spec = spec_or_name
    else:
        if func is None or not callable(func):
            raise ValueError(f"register_check({spec_or_name!r}): a check function is needed")
        spec = CheckSpec(spec_or_name, func, **fields)
    if spec.name in CHECKS and not replace and CHECKS[spec.name] is not spec:
        raise ValueError(f"a check named {spec.name!r} is already registered")
    CHECKS[spec.name] = spec
    return spec


def _load_lazy() -> None:
    """Import the reference-data checks and entry points, once."""
    global _loaded
    if _loaded:
        return
    _loaded = True
    for module_name, attrs, name, variables, judges, params in _REFERENCE_CHECKS:
        if name in CHECKS:
            continue
        try:
            module = importlib.import_module(module_name)
        except ImportError:
            continue  # module not installed/written yet: its checks are simply unavailable
        func = next((getattr(module, a) for a in attrs if callable(getattr(module, a, None))),
                    None)
        if func is not None:
            CHECKS[name] = CheckSpec(name, _accepting_variable(func), variables, judges=judges,
                                     params=params, description=f"from {module_name}")
    for ep in importlib.metadata.entry_points(group="qcflag.checks"):
        if ep.name in CHECKS:
            continue
        try:
            obj = ep.load()
        except Exception as exc:  # a broken plug-in must not break qcflag
            warnings.warn(f"qcflag: check plug-in {ep.name!r} ({ep.value}) failed to load: "
                          f"{exc}", RuntimeWarning, stacklevel=2)
            continue
        if isinstance(obj, CheckSpec):
            CHECKS.setdefault(obj.name, obj)
        elif callable(obj):
            CHECKS[ep.name] = CheckSpec(ep.name, _accepting_variable(obj),
                                        description=f"plug-in {ep.value}")


def _accepting_variable(func: CheckFunc) -> CheckFunc:
    """Wrap a check that takes no ``variable`` keyword (profile-level checks) to accept one."""
    try:
        takes = "variable" in inspect.signature(func).parameters
    except (TypeError, ValueError):
        takes = True
    if takes:
        return func

    @functools.wraps(func)
    def wrapper(batch: Any, *, variable: str | None = None, **params: Any) -> Any:
        return func(batch, **params)

    return wrapper


def available_checks() -> dict[str, CheckSpec]:
    """All registered checks, including reference-data checks and plug-ins.

    Returns
    -------
    dict of str to CheckSpec
    """
    _load_lazy()
    return dict(CHECKS)


def get_check(name: str) -> CheckSpec:
    """Return the spec of the check called `name`.

    Parameters
    ----------
    name : str
        Stable check name.

    Returns
    -------
    CheckSpec

    Raises
    ------
    KeyError
        If no such check is registered; the message lists the known names.
    """
    spec = CHECKS.get(name)
    if spec is None:
        _load_lazy()
        spec = CHECKS.get(name)
    if spec is None:
        raise KeyError(f"unknown check {name!r}; known checks: {', '.join(sorted(CHECKS))}")
    return spec


def _is_number(x: object) -> bool:
    return isinstance(x, (int, float)) and not isinstance(x, bool) and math.isfinite(x)


def _check_regions(key: str, value: object) -> list[dict[str, Any]]:
    if not isinstance(value, list) or not value:
        raise ParamError(key, f"{key} must be {PARAM_KINDS['regions']}")
    out = []
    for k, region in enumerate(value, start=1):
        if not isinstance(region, dict):
            raise ParamError(key, f"{key} #{k} must be a table")
        unknown = sorted(set(region) - _REGION_KEYS)
        if unknown:
            raise ParamError(unknown[0], f"region #{k}: unknown key {unknown[0]!r}; allowed: "
                             f"{', '.join(sorted(_REGION_KEYS))}")
        poly = region.get("polygon")
        ok = (isinstance(poly, list) and len(poly) >= 3
              and all(isinstance(v, list) and len(v) == 2 and all(map(_is_number, v))
                      and -90 <= v[0] <= 90 and -180 <= v[1] <= 360 for v in poly))
        if not ok:
            raise ParamError("polygon", f"region #{k}: polygon must be at least 3 "
                             "[latitude, longitude] pairs in degrees")
        for lim in ("minimum", "maximum"):
            if lim in region and not _is_number(region[lim]):
                raise ParamError(lim, f"region #{k}: {lim} must be a number")
        if "minimum" not in region and "maximum" not in region:
            raise ParamError("polygon", f"region #{k}: give a minimum and/or a maximum")
        out.append(dict(region))
    return out


def validate_params(spec: CheckSpec, params: Mapping[str, Any]) -> dict[str, Any]:
    """Check a rule step's parameters against `spec` and return them normalised.

    Parameters
    ----------
    spec : CheckSpec
        The check.
    params : mapping
        Parameters as read from the rule file.

    Returns
    -------
    dict
        Parameters with numbers as float/int as the kind requires.

    Raises
    ------
    ParamError
        On an unknown parameter, a value of the wrong kind, or a missing required one.
    """
    if spec.params is None:
        return dict(params)
    out: dict[str, Any] = {}
    for key, value in params.items():
        kind = spec.params.get(key)
        if kind is None:
            allowed = ", ".join(sorted(spec.params)) or "none"
            raise ParamError(key, f"check {spec.name!r} has no parameter {key!r} "
                             f"(allowed: {allowed})")
        bad = ParamError(key, f"{key} must be {PARAM_KINDS[kind]}, not {value!r}")
        if kind in ("float", "float+"):
            if not _is_number(value) or (kind == "float+" and value < 0):
                raise bad
            out[key] = float(value)
        elif kind == "int+":
            if not isinstance(value, int) or isinstance(value, bool) or value < 1:
                raise bad
            out[key] = int(value)
        elif kind == "bool":
            if not isinstance(value, bool):
                raise bad
            out[key] = value
        elif kind == "str":
            if not isinstance(value, str):
                raise bad
            out[key] = value
        elif kind == "variables":
            if not isinstance(value, list) or not all(v in _VARIABLES for v in value):
                raise bad
            out[key] = tuple(value)
        elif kind == "regions":
            out[key] = _check_regions(key, value)
        else:  # pragma: no cover - a spec with an unknown kind is a programming error
            raise ValueError(f"check {spec.name!r}: unknown parameter kind {kind!r}")
    missing = [k for k in spec.required if k not in out]
    if missing:
        raise ParamError(missing[0], f"check {spec.name!r} needs parameter {missing[0]!r}")
    return out
