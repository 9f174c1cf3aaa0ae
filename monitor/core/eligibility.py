"""Eligibility rules: which animals may go to a manipulation, group by group.

Rule: a protocol's `[eligibility]` table (kept raw by `parse_protocol`) names
one or more experimental groups, each a sub-table
`[eligibility.groups.NAME]` whose window is the conjunction of its
conditions: plateau reached in the final stage (`plateau`, default true) and
inclusive bounds `min_FIGURE` / `max_FIGURE` on the since-plateau counts, the
transparent measures and the model-based slow-state fraction. The model
figure never opens a window on its own: a group that bounds
`slow_fraction` must also bound a transparent figure, or the rule is refused
at parse time with file, line and key. `parse_eligibility` refuses unknown
keys, wrong types and empty or contradictory bounds; it is pure (the caller
reads the file). The same table says how the cohort's animals are assigned
to those groups (`assignment`, `per_block`) and whether operators see group
codes instead of names (`blinded`); `under_codes` renames the groups for a
blinded cohort. Every key is documented in docs/eligibility.md.
"""

from __future__ import annotations

import re
from dataclasses import dataclass, replace
from typing import Any, Mapping

from drivers.config import ConfigError, TomlFile
from monitor.core.assignment import BLOCKS_METHOD, COHORT_METHOD
from monitor.core.eligibility_figures import SINCE_PLATEAU, TRANSPARENT_MEASURES

SLOW = "slow_fraction"
TRANSPARENT_FIGURES = SINCE_PLATEAU + TRANSPARENT_MEASURES
FIGURES = TRANSPARENT_FIGURES + (SLOW,)
BASES = ("interval", "estimate")  # slow fraction judged on its whole 90 % interval, or on the estimate
DEFAULT_STATUSES = ("estimated",)
DEFAULT_WARN_SESSIONS = 2
# Figures whose values only grow with practice: above the maximum, the window has passed.
GROWING = SINCE_PLATEAU + (SLOW,)
_FRACTIONS = ("hit_rate", "fixed_window_fraction", SLOW)
_NON_NEGATIVE = ("interval_error", "cv") + SINCE_PLATEAU
_COUNTS = SINCE_PLATEAU
_TOP_KEYS = {"cohort", "warn_sessions", "groups", "assignment", "per_block", "blinded"}
ASSIGNMENT_METHODS = {"blocks": BLOCKS_METHOD, "cohort": COHORT_METHOD}  # `assignment` word -> method
_GROUP_KEYS = ({"label", "plateau", "slow_fraction_basis", "slow_fraction_status"}
               | {f"{side}_{figure}" for side in ("min", "max") for figure in FIGURES})
_BARE = re.compile(r"^[A-Za-z0-9_\-]+$")

LABELS = {      # one definition per figure, with its unit, wherever a person reads it (window, report, logs)
    "sessions_since_plateau": "Sessions since plateau (included sessions after the plateau session)",
    "trials_since_plateau": "Trials since plateau (completed trials of those sessions)",
    "interval_error": "Interval error, median |ln(interval ÷ target)| (latest session; 0 is on target)",
    "cv": "CV of intervals, SD ÷ mean (latest session)",
}

DISPLAY = {
    "sessions_since_plateau": "sessions since plateau",
    "trials_since_plateau": "trials since plateau",
    "hit_rate": "hit rate",
    "fixed_window_fraction": "fraction in the fixed window",
    "interval_error": "interval error",
    "cv": "CV",
    "start_drop": "start-of-session drop",
    SLOW: "slow-state fraction",
}


@dataclass(frozen=True, slots=True)
class Bound:
    """Inclusive bounds on one figure (None = no bound on that side)."""

    figure: str
    low: float | None = None
    high: float | None = None

    def holds(self, value: float) -> bool:
        return (self.low is None or value >= self.low) and (self.high is None or value <= self.high)

    def needs(self) -> str:
        """'≤ 0.25', '≥ 8', '2 to 6'."""
        if self.low is not None and self.high is not None:
            return f"{format_figure(self.low)} to {format_figure(self.high)}"
        if self.low is not None:
            return f"≥ {format_figure(self.low)}"
        return f"≤ {format_figure(self.high)}"

    def describe(self) -> str:
        """'CV ≤ 0.25', 'sessions since plateau 2 to 6'."""
        return f"{DISPLAY[self.figure]} {self.needs()}"


@dataclass(frozen=True, slots=True)
class SlowBound:
    """Bounds on the model-based slow-state fraction and what makes it usable."""

    low: float | None
    high: float | None
    basis: str = "interval"
    statuses: tuple[str, ...] = DEFAULT_STATUSES

    @property
    def bound(self) -> Bound:
        return Bound(SLOW, self.low, self.high)


@dataclass(frozen=True, slots=True)
class GroupRule:
    """One experimental group's window."""

    name: str
    label: str
    plateau: bool
    bounds: tuple[Bound, ...]  # transparent figures, in FIGURES order
    slow: SlowBound | None


@dataclass(frozen=True, slots=True)
class EligibilityRule:
    """A cohort's eligibility rule: its groups, in the order written."""

    groups: tuple[GroupRule, ...]
    cohort: str | None = None
    warn_sessions: int = DEFAULT_WARN_SESSIONS
    protocol_name: str | None = None
    protocol_version: int | None = None
    assignment: str = BLOCKS_METHOD     # how animals are drawn into the groups (monitor.core.assignment)
    per_block: int = 1
    blinded: bool = False

    def group(self, name: str) -> GroupRule | None:
        for group in self.groups:
            if group.name == name:
                return group
        return None

    @property
    def cohort_name(self) -> str:
        """The cohort the rule is written for: `cohort`, else the protocol's name."""
        return self.cohort or self.protocol_name or "cohort"

    def under_codes(self, codes: Mapping[str, str]) -> "EligibilityRule":
        """The same rule with each group's name and label replaced by its code (group -> code)."""
        return replace(self, groups=tuple(replace(g, name=codes[g.name], label=codes[g.name]) for g in self.groups))


def format_figure(value: float) -> str:
    return f"{value:g}" if float(value).is_integer() else f"{value:.3g}"


class _Where:
    """Names file/line/key through the TomlFile when there is one."""

    def __init__(self, doc: TomlFile | None, base: str = "eligibility") -> None:
        self.doc, self.base = doc, base

    def error(self, table: str, key: str, message: str) -> ConfigError:
        if self.doc is not None:
            if self.doc.line_of(table, key) is None:
                table = self.base  # inline tables: point at [eligibility] at least
            return self.doc.error(table, key, message)
        return ConfigError("<eligibility>", None, f"[{table}] {key}".strip(), message)


def parse_eligibility(table: dict[str, Any], doc: TomlFile | None = None, *,
                      protocol_name: str | None = None,
                      protocol_version: int | None = None) -> EligibilityRule | None:
    """The rule in a protocol's raw `[eligibility]` table; None when the table is empty.

    Raises ConfigError naming file, line and key (through `doc` when given).
    """
    if not table:
        return None
    where = _Where(doc)
    for key in table:
        if key not in _TOP_KEYS:
            raise where.error("eligibility", key, f"unknown key (expected one of: {', '.join(sorted(_TOP_KEYS))})")
    cohort = table.get("cohort")
    if cohort is not None and (not isinstance(cohort, str) or not cohort.strip()):
        raise where.error("eligibility", "cohort", "must be a non-empty string")
    warn = table.get("warn_sessions", DEFAULT_WARN_SESSIONS)
    if isinstance(warn, bool) or not isinstance(warn, int) or warn < 0:
        raise where.error("eligibility", "warn_sessions", f"expected a whole number >= 0, got {warn!r}")
    groups_table = table.get("groups")
    if not isinstance(groups_table, dict) or not groups_table:
        raise where.error("eligibility", "groups",
                          "define at least one group as a [eligibility.groups.NAME] table")
    groups = []
    for name, values in groups_table.items():
        if not _BARE.match(name):
            raise where.error("eligibility.groups", name,
                              "group names are bare words (letters, digits, _ or -); put prose in `label`")
        if not isinstance(values, dict):
            raise where.error("eligibility.groups", name, "must be a table of conditions")
        groups.append(_parse_group(name, values, where))
    assignment = table.get("assignment", "blocks")
    if assignment not in ASSIGNMENT_METHODS:
        raise where.error("eligibility", "assignment",
                          f"expected one of {', '.join(map(repr, ASSIGNMENT_METHODS))}, got {assignment!r}")
    per_block = table.get("per_block", 1)
    if isinstance(per_block, bool) or not isinstance(per_block, int) or per_block < 1:
        raise where.error("eligibility", "per_block", f"expected a whole number >= 1, got {per_block!r}")
    blinded = table.get("blinded", False)
    if not isinstance(blinded, bool):
        raise where.error("eligibility", "blinded", f"expected true or false, got {blinded!r}")
    return EligibilityRule(tuple(groups), cohort, warn, protocol_name, protocol_version,
                           ASSIGNMENT_METHODS[assignment], per_block, blinded)


def _parse_group(name: str, values: dict[str, Any], where: _Where) -> GroupRule:
    table = f"eligibility.groups.{name}"
    for key in values:
        if key not in _GROUP_KEYS:
            raise where.error(table, key, "unknown key (see docs/eligibility.md for the keys of a group)")
    label = values.get("label", name.replace("_", " "))
    if not isinstance(label, str) or not label.strip():
        raise where.error(table, "label", "must be a non-empty string")
    plateau = values.get("plateau", True)
    if not isinstance(plateau, bool):
        raise where.error(table, "plateau", f"expected true or false, got {plateau!r}")
    bounds = {figure: _parse_bound(table, figure, values, where) for figure in FIGURES}
    bounds = {figure: bound for figure, bound in bounds.items() if bound is not None}
    if not plateau:
        for figure in SINCE_PLATEAU:
            if figure in bounds:
                key = f"min_{figure}" if bounds[figure].low is not None else f"max_{figure}"
                raise where.error(table, key, "counts since plateau need `plateau = true`")
    slow = None
    if SLOW in bounds:
        transparent = [figure for figure in TRANSPARENT_FIGURES if figure in bounds]
        if not transparent:
            key = f"min_{SLOW}" if bounds[SLOW].low is not None else f"max_{SLOW}"
            raise where.error(table, key,
                              "the model-based slow-state fraction never opens a window on its own: "
                              "also bound a transparent figure (min_/max_ of "
                              f"{', '.join(TRANSPARENT_FIGURES)})")
        basis = values.get("slow_fraction_basis", "interval")
        if basis not in BASES:
            raise where.error(table, "slow_fraction_basis", f"expected one of {', '.join(BASES)}, got {basis!r}")
        statuses = values.get("slow_fraction_status", list(DEFAULT_STATUSES))
        if isinstance(statuses, str):
            statuses = [statuses]
        if (not isinstance(statuses, list) or not statuses
                or not all(isinstance(s, str) and s.strip() for s in statuses)):
            raise where.error(table, "slow_fraction_status", "expected a status word or a list of them")
        slow = SlowBound(bounds[SLOW].low, bounds[SLOW].high, basis, tuple(statuses))
    else:
        for key in ("slow_fraction_basis", "slow_fraction_status"):
            if key in values:
                raise where.error(table, key, f"has no effect without min_{SLOW} or max_{SLOW}")
    if not plateau and not bounds:
        raise where.error(table, "plateau", "a group with `plateau = false` must bound at least one figure")
    return GroupRule(name, label.strip(), plateau,
                     tuple(bounds[f] for f in TRANSPARENT_FIGURES if f in bounds), slow)


def _parse_bound(table: str, figure: str, values: dict[str, Any], where: _Where) -> Bound | None:
    sides = {}
    for side in ("min", "max"):
        key = f"{side}_{figure}"
        if key not in values:
            continue
        value = values[key]
        if figure in _COUNTS:
            if isinstance(value, bool) or not isinstance(value, int):
                raise where.error(table, key, f"expected a whole number, got {value!r}")
        elif isinstance(value, bool) or not isinstance(value, (int, float)) or value != value:
            raise where.error(table, key, f"expected a number, got {value!r}")
        if figure in _FRACTIONS and not 0 <= value <= 1:
            raise where.error(table, key, "must be between 0 and 1")
        if figure in _NON_NEGATIVE and value < 0:
            raise where.error(table, key, "must be >= 0")
        sides[side] = float(value)
    if not sides:
        return None
    low, high = sides.get("min"), sides.get("max")
    if low is not None and high is not None and low > high:
        raise where.error(table, f"max_{figure}", f"is below min_{figure} ({format_figure(low)}): the window is empty")
    return Bound(figure, low, high)
