"""Run rules on a chart's sequence of values.

Adaptations marked as common practice: the run rules of Western Electric
(1956) and Nelson (1984) were written for Shewhart charts with 2-sigma and
3-sigma zones; here they use the reference model's warning and action
levels, and on one-sided charts (T², SPE, combined index) only the upper
limits exist and the centre line is the median of the statistic's reference
distribution.

References
----------
Western Electric Company (1956) Statistical Quality Control Handbook.
Nelson, L.S. (1984) The Shewhart control chart: tests for special causes.
    Journal of Quality Technology 16(4), 237-239.
Montgomery, D.C. Introduction to Statistical Quality Control (chapter on
    Shewhart charts).
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass
from typing import ClassVar

import numpy as np

from analysis.errors import InputError
from analysis.monitoring.limits import LEVELS, ChartLimits


@dataclass(frozen=True)
class RuleViolation:
    """One firing of a run rule on a chart.

    ``indices`` is the window of positions the rule looked at (0-based, in
    the sequence given), ``fired_at`` the position of the point that
    completed the pattern (the last of ``indices``), ``side`` one of
    "above", "below", "rising", "falling".
    """

    rule_id: str
    label: str
    source: str
    indices: tuple
    fired_at: int
    side: str


def _check_level(level) -> None:
    if level not in LEVELS:
        raise InputError(f"level={level!r} must be 'warning' or 'action'")


MAX_WINDOW = 50  # the longest pattern a rule may look at (common practice uses 9 or fewer points)


def _check_count(name: str, value, minimum: int, maximum: int | None = None) -> None:
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < minimum:
        raise InputError(f"{name}={value!r} must be a whole number of at least {minimum}")
    if maximum is not None and value > maximum:
        raise InputError(f"{name}={value!r} must be a whole number from {minimum} to {maximum}")


def _beyond(x: np.ndarray, chart: ChartLimits, level: str):
    """(side, points beyond the limit) for the upper limit, and the lower one on two-sided charts."""
    yield "above", x > chart.upper(level)
    if chart.two_sided:
        yield "below", x < chart.lower(level)


def _run_lengths(hits: np.ndarray) -> np.ndarray:
    """Length of the run of True values ending at each position (0 where False)."""
    position = np.arange(hits.size)
    last_miss = np.maximum.accumulate(np.where(hits, -1, position))
    return position - last_miss


def _window(end: int, length: int) -> tuple:
    return tuple(range(max(0, end - length + 1), end + 1))


@dataclass(frozen=True)
class BeyondLimit:
    """One point beyond the action (or warning) limit.

    Western Electric (1956) rule 1 and Nelson (1984) test 1 (a point beyond
    3 sigma). At the warning level: common practice.
    """

    level: str = "action"
    kind: ClassVar[str] = "beyond"

    def __post_init__(self):
        _check_level(self.level)

    @property
    def id(self) -> str:
        return f"beyond-{self.level}"

    @property
    def label(self) -> str:
        return f"1 point beyond the {self.level} limit"

    @property
    def source(self) -> str:
        if self.level == "action":
            return "Western Electric (1956) rule 1; Nelson (1984) test 1"
        return "common practice"

    def config(self) -> dict:
        return {"rule": self.kind, "level": self.level}

    @property
    def window(self) -> int:
        """Points the rule looks at, the one it fires at included."""
        return 1

    def violations(self, x: np.ndarray, chart: ChartLimits) -> list[RuleViolation]:
        return [
            RuleViolation(self.id, self.label, self.source, (i,), i, side)
            for side, hits in _beyond(x, chart, self.level)
            for i in np.flatnonzero(hits).tolist()
        ]


@dataclass(frozen=True)
class KOfMBeyond:
    """k of m consecutive points beyond the warning (or action) limit on the same side.

    2 of 3 beyond the warning limit: Western Electric (1956) rule 2 and Nelson
    (1984) test 5 (2 of 3 beyond 2 sigma). Other k, m or levels: common
    practice. The point that completes the pattern must itself be beyond the
    limit; points beyond the action limit count as beyond the warning limit;
    at the start of the sequence the window holds the points there are.
    """

    k: int = 2
    m: int = 3
    level: str = "warning"
    kind: ClassVar[str] = "k_of_m"

    def __post_init__(self):
        _check_count("k", self.k, 1)
        _check_count("m (window)", self.m, max(int(self.k), 1), MAX_WINDOW)
        _check_level(self.level)

    @property
    def id(self) -> str:
        return f"{self.k}-of-{self.m}-beyond-{self.level}"

    @property
    def label(self) -> str:
        return f"{self.k} of {self.m} consecutive points beyond the {self.level} limit, same side"

    @property
    def source(self) -> str:
        if (self.k, self.m, self.level) == (2, 3, "warning"):
            return "Western Electric (1956) rule 2; Nelson (1984) test 5"
        return "common practice"

    def config(self) -> dict:
        return {"rule": self.kind, "k": int(self.k), "m": int(self.m), "level": self.level}

    @property
    def window(self) -> int:
        """Points the rule looks at, the one it fires at included."""
        return int(self.m)

    def violations(self, x: np.ndarray, chart: ChartLimits) -> list[RuleViolation]:
        found = []
        for side, hits in _beyond(x, chart, self.level):
            total = np.cumsum(hits, dtype=np.int64)
            in_window = total.copy()
            in_window[self.m :] -= total[: -self.m]
            for i in np.flatnonzero(hits & (in_window >= self.k)).tolist():
                found.append(RuleViolation(self.id, self.label, self.source, _window(i, self.m), i, side))
        return found


@dataclass(frozen=True)
class RunOneSide:
    """``length`` points in a row on one side of the centre line.

    8 points: Western Electric (1956) rule 4; Nelson (1984) test 2 uses 9.
    Other lengths, and one-sided charts (centre = median of the reference
    distribution): common practice. A point on the centre line ends a run.
    """

    length: int = 8
    kind: ClassVar[str] = "run"

    def __post_init__(self):
        _check_count("length", self.length, 2, MAX_WINDOW)

    @property
    def id(self) -> str:
        return f"{self.length}-one-side"

    @property
    def label(self) -> str:
        return f"{self.length} points in a row on one side of the centre line"

    @property
    def source(self) -> str:
        return {
            8: "Western Electric (1956) rule 4; Nelson (1984) test 2 uses 9",
            9: "Nelson (1984) test 2",
        }.get(int(self.length), "common practice")

    def config(self) -> dict:
        return {"rule": self.kind, "length": int(self.length)}

    @property
    def window(self) -> int:
        """Points the rule looks at, the one it fires at included."""
        return int(self.length)

    def violations(self, x: np.ndarray, chart: ChartLimits) -> list[RuleViolation]:
        if chart.centre is None:
            raise InputError(f"run rule {self.id!r} needs a centre line; this chart has none")
        found = []
        for side, hits in (("above", x > chart.centre), ("below", x < chart.centre)):
            for i in np.flatnonzero(_run_lengths(hits) >= self.length).tolist():
                found.append(RuleViolation(self.id, self.label, self.source, _window(i, self.length), i, side))
        return found


@dataclass(frozen=True)
class Trend:
    """``length`` points in a row steadily increasing or decreasing.

    6 points: Nelson (1984) test 3. Other lengths, and T²/SPE charts: common
    practice. Two equal neighbours end a trend.
    """

    length: int = 6
    kind: ClassVar[str] = "trend"

    def __post_init__(self):
        _check_count("length", self.length, 3, MAX_WINDOW)

    @property
    def id(self) -> str:
        return f"{self.length}-trend"

    @property
    def label(self) -> str:
        return f"{self.length} points in a row steadily increasing or decreasing"

    @property
    def source(self) -> str:
        return "Nelson (1984) test 3" if self.length == 6 else "common practice"

    def config(self) -> dict:
        return {"rule": self.kind, "length": int(self.length)}

    @property
    def window(self) -> int:
        """Points the rule looks at, the one it fires at included."""
        return int(self.length)

    def violations(self, x: np.ndarray, chart: ChartLimits) -> list[RuleViolation]:
        step = np.diff(x)
        found = []
        for side, hits in (("rising", step > 0), ("falling", step < 0)):
            # step k joins points k and k+1: a run of length-1 steps ending at step k fires at point k+1
            for k in np.flatnonzero(_run_lengths(hits) >= self.length - 1).tolist():
                found.append(RuleViolation(self.id, self.label, self.source, _window(k + 1, self.length), k + 1, side))
        return found


RULE_TYPES = (BeyondLimit, KOfMBeyond, RunOneSide, Trend)
DEFAULT_RULES = (BeyondLimit("action"), KOfMBeyond(2, 3, "warning"), RunOneSide(8), Trend(6))


def rule_from_config(config) -> BeyondLimit | KOfMBeyond | RunOneSide | Trend:
    """A run rule from its ``config()`` dict, e.g. {"rule": "k_of_m", "k": 2, "m": 3, "level": "warning"}."""
    kinds = {cls.kind: cls for cls in RULE_TYPES}
    if not isinstance(config, dict) or "rule" not in config:
        raise InputError(f"a run rule is given as a dict with a 'rule' key ({', '.join(kinds)}), got {config!r}")
    cls = kinds.get(config["rule"])
    if cls is None:
        raise InputError(f"unknown run rule {config['rule']!r}; known rules: {', '.join(kinds)}")
    params = {key: value for key, value in config.items() if key != "rule"}
    allowed = {field.name for field in dataclasses.fields(cls)}
    unknown = sorted(set(params) - allowed)
    if unknown:
        raise InputError(f"run rule {config['rule']!r} has no setting(s) {', '.join(unknown)}")
    return cls(**params)


def rules_from_config(configs) -> tuple:
    """Run rules from a list of ``config()`` dicts; InputError naming the first bad one."""
    if not isinstance(configs, (list, tuple)) or not configs:
        raise InputError("run rules are given as a non-empty list of rule settings, e.g. "
                         '[{"rule": "beyond", "level": "action"}, {"rule": "run", "length": 8}]')
    rules = []
    for position, config in enumerate(configs):
        try:
            rules.append(rule_from_config(config))
        except (InputError, TypeError) as exc:
            raise InputError(f"run rule {position + 1}: {exc}") from exc
    ids = [rule.id for rule in rules]
    repeated = sorted({i for i in ids if ids.count(i) > 1})
    if repeated:
        raise InputError(f"run rule(s) given more than once: {', '.join(repeated)}")
    return tuple(rules)


def longest_window(rules) -> int:
    """The most points any of ``rules`` looks at: a rule's firing at a new point depends on that
    point and the ``longest_window - 1`` points before it only."""
    return max((rule.window for rule in rules), default=1)


def _series(values, what: str) -> np.ndarray:
    """``values`` as a 1-D float array of finite numbers, or InputError naming the first bad position."""
    try:
        x = np.asarray(values, dtype=np.float64)
    except (TypeError, ValueError) as exc:
        raise InputError(f"{what} must be numbers: {exc}") from exc
    if x.ndim != 1:
        raise InputError(f"{what} must be one sequence of numbers, got {x.ndim} dimension(s)")
    bad = np.flatnonzero(~np.isfinite(x))
    if bad.size:
        raise InputError(f"{what}: value {x[bad[0]]!r} at position {bad[0]} is not a finite number")
    return x


def check_run_rules(values, chart: ChartLimits, rules=DEFAULT_RULES) -> list[RuleViolation]:
    """Every violation of ``rules`` on a chart's values in run order.

    A rule fires at every point that completes its pattern, so a violation,
    once found, does not change when later points arrive. On one-sided
    charts (T², SPE, combined index) only the upper limits exist and the
    centre line is the median of the reference distribution (common
    practice). Returns the violations ordered by ``fired_at``, then by the
    order of ``rules``.
    """
    x = _series(values, "chart values")
    if not isinstance(chart, ChartLimits):
        raise InputError(f"chart must be ChartLimits, got {type(chart).__name__}")
    found = []
    for order, rule in enumerate(rules):
        if not isinstance(rule, RULE_TYPES):
            raise InputError(f"unknown run rule {rule!r}; use one of {', '.join(c.__name__ for c in RULE_TYPES)}")
        found += [(violation.fired_at, order, violation) for violation in rule.violations(x, chart)]
    found.sort(key=lambda item: (item[0], item[1]))
    return [violation for _, _, violation in found]
