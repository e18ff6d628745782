"""Rule sets: which checks run, on which variables, with which thresholds, in which order.

A rule set is a TOML file. Its layout (qcflag's own)::

    [rule_set]
    name = "my-programme"
    summary = "One line saying what these rules are for."

    [[step]]                       # steps run in file order
    check = "spike"                # a registered check name
    variable = "temperature"       # or a list: ["temperature", "salinity"]
    shallow_limit = 6.0            # the check's parameters...
    deep_limit = 2.0
    source = "where the numbers come from"
    # verdict = false              # keep the statistic as a feature, give no grade
    # when_available = true        # skip quietly if the check is not installed

    [[step]]
    check = "regional_range"
    variable = "temperature"
    [[step.regions]]
    name = "Red Sea"
    polygon = [[10.0, 40.0], [20.0, 50.0], [30.0, 30.0]]   # [latitude, longitude]
    minimum = 21.7

The built-in rule sets ``standard`` and ``coastal`` live in the top-level ``rules/`` folder,
shipped as the package ``qcflag.rulesets``. To change thresholds, copy one, edit it and pass
its path (``--rules FILE`` on the command line).

Checks run in file order and grades combine as a maximum. Following the Argo flag policy
(ARGO-QC §2.1.4, via ../shared/reference/qc-standards.md §1.5, tag M), a level graded 4 by an
earlier step is not used as a neighbour by later neighbour-based checks (spike, gradient,
digit rollover, stuck value, flat line, density inversion, the shape statistics).
"""

from __future__ import annotations

import copy
import hashlib
import importlib.resources
import re
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from qcflag.checks.base import CheckResult, CheckTable
from qcflag.checks.registry import CheckSpec, ParamError, get_check, validate_params
from qcflag.exceptions import RuleSetError
from qcflag.profiles import LEVEL_VARIABLES

if TYPE_CHECKING:
    from qcflag.profiles import ProfileBatch

__all__ = ["BUILTIN_RULE_SETS", "RuleSet", "RuleStep", "load_rules", "run_checks"]

BUILTIN_RULE_SETS: tuple[str, ...] = ("standard", "coastal")
"""Names of the rule sets shipped with qcflag."""

_STEP_KEYS = {"check", "variable", "source", "verdict", "when_available"}
_HEADER_KEYS = {"name", "summary", "source"}


@dataclass(frozen=True)
class RuleStep:
    """One configured application of a check.

    Parameters
    ----------
    check : str
        Registered check name.
    variable : str
        Variable the step applies to.
    params : dict
        Validated check parameters.
    verdict : bool
        False keeps only the statistic (grade 0).
    source : str
        Where the thresholds come from.
    line : int
        Line of the step's header in the rule file (1-based).
    """

    check: str
    variable: str
    params: dict[str, Any]
    verdict: bool = True
    source: str = ""
    line: int = 0


@dataclass(frozen=True)
class RuleSet:
    """A parsed and validated rule set.

    Parameters
    ----------
    name : str
        Rule-set name (``[rule_set] name``, or the file stem).
    path : pathlib.Path or None
        File it was read from (None for a text given directly).
    text : str
        The raw file text, kept for reports and provenance.
    steps : list of RuleStep
        Steps in run order. Steps whose check is not installed and that say
        ``when_available = true`` are left out.
    summary : str
        One-line description.
    skipped : list of str
        Checks left out because they are not installed.
    """

    name: str
    path: Path | None
    text: str
    steps: list[RuleStep] = field(default_factory=list)
    summary: str = ""
    skipped: list[str] = field(default_factory=list)

    @property
    def checks(self) -> list[tuple[str, str, dict[str, Any]]]:
        """Steps as ``(check_name, variable, params)`` in run order."""
        return [(s.check, s.variable, s.params) for s in self.steps]

    @property
    def digest(self) -> str:
        """SHA-256 of the rule-set text (to record which rules produced a result)."""
        return hashlib.sha256(self.text.encode("utf-8")).hexdigest()


class _Locator:
    """Find the line of a step / key in the rule-file text for error messages."""

    def __init__(self, text: str, where: str) -> None:
        self.lines = text.splitlines()
        self.where = where
        self.step_lines = [i for i, ln in enumerate(self.lines, start=1)
                           if re.match(r"\s*\[\[\s*step\s*\]\]", ln)]

    def step(self, k: int) -> int:
        return self.step_lines[k] if k < len(self.step_lines) else 0

    def key(self, k: int, key: str) -> int:
        """Line of `key` inside step `k` (or the step header if not found)."""
        start = self.step(k)
        end = self.step_lines[k + 1] if k + 1 < len(self.step_lines) else len(self.lines) + 1
        pat = re.compile(rf"\s*[\"']?{re.escape(key)}[\"']?\s*=|\s*\[\[?\s*step\.{re.escape(key)}")
        for i in range(max(start, 1), end):
            if pat.match(self.lines[i - 1]):
                return i
        return start

    def top(self, key: str) -> int:
        pat = re.compile(rf"\s*\[*\s*[\"']?{re.escape(key)}[\"']?\s*[\]=.]")
        for i, ln in enumerate(self.lines, start=1):
            if pat.match(ln):
                return i
        return 0

    def error(self, line: int, message: str) -> RuleSetError:
        at = f"{self.where}, line {line}" if line else self.where
        return RuleSetError(f"{at}: {message}")


def _parse(text: str, *, where: str, path: Path | None, default_name: str) -> RuleSet:
    loc = _Locator(text, where)
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise RuleSetError(f"{where}: not valid TOML: {exc} (fix the syntax there)") from None
    for key in data:
        if key not in ("rule_set", "step"):
            raise loc.error(loc.top(key), f"unknown top-level entry {key!r}; a rule set has "
                            "a [rule_set] table and [[step]] tables")
    header = data.get("rule_set", {})
    if not isinstance(header, dict):
        raise loc.error(loc.top("rule_set"), "rule_set must be a table: [rule_set]")
    for key in header:
        if key not in _HEADER_KEYS:
            raise loc.error(loc.top(key), f"unknown key {key!r} in [rule_set]; allowed: "
                            f"{', '.join(sorted(_HEADER_KEYS))}")
    raw_steps = data.get("step", [])
    if not isinstance(raw_steps, list) or not raw_steps:
        raise loc.error(0, "no [[step]] tables: a rule set needs at least one step")
    steps: list[RuleStep] = []
    skipped: list[str] = []
    for k, raw in enumerate(raw_steps):
        line = loc.step(k)
        name = raw.get("check")
        if not isinstance(name, str):
            raise loc.error(line, "step has no check = \"<name>\"")
        for key in ("verdict", "when_available"):
            if key in raw and not isinstance(raw[key], bool):
                raise loc.error(loc.key(k, key), f"{key} must be true or false")
        try:
            spec = get_check(name)
        except KeyError as exc:
            if raw.get("when_available", False):
                skipped.append(name)
                continue
            raise loc.error(loc.key(k, "check"), str(exc.args[0])) from None
        variables = _step_variables(raw, spec, loc, k)
        params = {key: v for key, v in raw.items() if key not in _STEP_KEYS}
        try:
            params = validate_params(spec, params)
        except ParamError as exc:
            raise loc.error(loc.key(k, exc.key), str(exc)) from None
        source = raw.get("source", "")
        if not isinstance(source, str):
            raise loc.error(loc.key(k, "source"), "source must be a string")
        steps.extend(
            RuleStep(name, var, params, verdict=bool(raw.get("verdict", True)) and spec.verdict,
                     source=source, line=line)
            for var in variables
        )
    rs_name = header.get("name", default_name)
    if not isinstance(rs_name, str):
        raise loc.error(loc.top("name"), "name must be a string")
    return RuleSet(name=rs_name, path=path, text=text, steps=steps,
                   summary=str(header.get("summary", "")), skipped=skipped)


def _step_variables(raw: dict[str, Any], spec: CheckSpec, loc: _Locator, k: int) -> list[str]:
    var = raw.get("variable")
    if var is None:
        if spec.judges is None:
            raise loc.error(loc.step(k), f"step {spec.name!r} needs variable = one of "
                            f"{list(spec.variables)}")
        return [spec.variables[0]]
    names = [var] if isinstance(var, str) else var
    if not isinstance(names, list) or not names or not all(isinstance(v, str) for v in names):
        raise loc.error(loc.key(k, "variable"), "variable must be a name or a list of names")
    for v in names:
        if v not in spec.variables:
            raise loc.error(loc.key(k, "variable"), f"check {spec.name!r} does not apply to "
                            f"{v!r}; it applies to {list(spec.variables)}")
    return names


def load_rules(rules: str | Path | RuleSet | None = None) -> RuleSet:
    """Load and validate a rule set.

    Parameters
    ----------
    rules : str, path-like, RuleSet or None
        ``None`` or ``"standard"`` for the published Argo real-time thresholds,
        ``"coastal"`` for the shelf/coastal variant, or the path of a TOML file. A
        :class:`RuleSet` is returned unchanged.

    Returns
    -------
    RuleSet
        A fresh copy: changing it does not change what later calls return.

    Raises
    ------
    RuleSetError
        If the file is missing or malformed; the message names the file and line.

    Notes
    -----
    Parsing and validating a rule set costs a few milliseconds, as much as checking a few
    thousand levels, so each process keeps the parsed sets (see :func:`_shared_rules`); a
    rule file is still read on every call and parsed again when its text changed.
    """
    if isinstance(rules, RuleSet):
        return rules
    return copy.deepcopy(_shared_rules(rules))


_PARSED: dict[tuple[Any, ...], tuple[RuleSet, tuple[CheckSpec, ...]]] = {}
_PARSED_MAX = 8


def _shared_rules(rules: str | Path | RuleSet | None) -> RuleSet:
    """Return the parsed rule set shared within the process (read it, never change it).

    :func:`run_checks` and :func:`qcflag.scale.flag_files_parallel` use this to skip the
    copy :func:`load_rules` makes. Parsed sets are kept per process, keyed on the built-in
    name or the file's path as given and its text (so an edited file is parsed again, even
    within the file system's time resolution), and on the registered checks (a plug-in
    registered later, or removed, gives a new parse). At most ``_PARSED_MAX`` sets are kept.
    """
    from qcflag.checks.registry import available_checks

    if isinstance(rules, RuleSet):
        return rules
    if rules is None:
        rules = "standard"
    path: Path | None = None
    if isinstance(rules, str) and rules in BUILTIN_RULE_SETS:
        source: tuple[Any, ...] = ("built-in", rules)
        text: str | None = None
    else:
        path = Path(rules)
        if not path.is_file():
            raise RuleSetError(
                f"{path}: no such rule-set file (give {' or '.join(BUILTIN_RULE_SETS)}, or "
                "the path of a TOML file)"
            )
        try:
            text = path.read_text(encoding="utf-8")
        except (OSError, UnicodeDecodeError) as exc:
            raise RuleSetError(f"{path}: cannot read the rule set ({exc})") from None
        source = ("file", path, text)
    specs = available_checks()
    key = (source, tuple((n, id(spec)) for n, spec in specs.items()))
    found = _PARSED.get(key)
    if found is not None:
        return found[0]
    if path is None or text is None:
        res = importlib.resources.files("qcflag.rulesets").joinpath(f"{rules}.toml")
        parsed = _parse(res.read_text(encoding="utf-8"),
                        where=f"built-in rule set {rules!r}", path=None, default_name=str(rules))
    else:
        parsed = _parse(text, where=str(path), path=path, default_name=path.stem)
    while len(_PARSED) >= _PARSED_MAX:
        del _PARSED[next(iter(_PARSED))]  # the oldest
    _PARSED[key] = parsed, tuple(specs.values())  # the specs stay alive: ids not reused
    return parsed


def run_checks(batch: ProfileBatch, rules: str | Path | RuleSet | None = None) -> CheckTable:
    """Run every step of a rule set on a batch.

    Parameters
    ----------
    batch : ProfileBatch
        Profiles to check (not modified).
    rules : str, path-like, RuleSet or None
        As for :func:`load_rules`.

    Returns
    -------
    CheckTable
        ``(check, variable) -> CheckResult`` in run order. When one check gives a variable
        results from more than one step (e.g. the pressure part of global range also grades
        temperature), grades combine as the maximum and the statistic of the step that
        targeted that variable is kept.

    Notes
    -----
    Steps run in file order. After each step with a verdict, the levels it graded 4 are
    excluded as neighbours from later neighbour-based checks of the same variable (Argo
    flag policy). Checks still compute their statistic at an excluded level itself where
    they can, so the feature stays informative.
    """
    rs = _shared_rules(rules)  # only read here: no copy
    n = batch.n_levels
    excluded = {v: np.zeros(n, dtype=bool) for v in LEVEL_VARIABLES}
    results: dict[tuple[str, str], CheckResult] = {}
    owned: set[tuple[str, str]] = set()
    no_grade = np.zeros(n, dtype=np.int8)
    for step in rs.steps:
        spec = get_check(step.check)
        kwargs = dict(step.params)
        if spec.neighbours_from is not None:
            sources = spec.neighbours_from or (step.variable,)
            mask = np.zeros(n, dtype=bool)
            for v in sources:
                mask |= excluded[v]
            kwargs["exclude"] = mask
        out = spec.func(batch, variable=step.variable, **kwargs)
        if isinstance(out, CheckResult):
            out = {step.variable: out}
        for var, res in out.items():
            if not step.verdict:
                res = CheckResult(res.statistic, no_grade)
            key = (step.check, var)
            own = var == step.variable or spec.judges is not None
            if key in results:
                old = results[key]
                if own and key not in owned:
                    stat = res.statistic
                elif own:
                    stat = np.fmax(old.statistic, res.statistic)
                else:
                    stat = old.statistic
                res = CheckResult(stat, np.maximum(old.grade, res.grade))
            results[key] = res
            if own:
                owned.add(key)
            if step.verdict and var in excluded:
                excluded[var] |= res.grade == 4
    return CheckTable(results, n)
