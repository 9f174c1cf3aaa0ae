"""Judging an animal against an eligibility rule, and what changed since last time.

Rule: `evaluate(rule, figures)` is a pure function of the rule and one
`AnimalFigures`. Each group's window is "open" when every condition holds,
"passed" when a growing figure (a since-plateau count, or the slow-state
fraction on the conservative side of its interval) is above its maximum,
"unknown" when a condition cannot be judged (a measure missing, the
slow-state status not accepted), "not plateaued", or else "not yet". A model
condition is judged only alongside the group's transparent ones (parse time
makes sure there are some). The animal's state, in plain words: "training",
"waiting for a window", "in window: LABEL", "window passed" or "needs review"
(figures from another protocol version, or a window blocked only by figures
that cannot be judged), with a one-sentence reason. Forecasts are ranges of
sessions (see eligibility.figures); exact ones come from the since-plateau
bounds, model ones from `figures.forecast`. `window_changes(previous,
current)` lists the alerts: windows that opened or closed, and windows
closing (or opening) within `warn_sessions`, each once per change; only the
verdict's `open_groups` count as open (a verdict needing review opens none).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

from monitor.core.eligibility.rules import DISPLAY, GROWING, Bound, EligibilityRule, GroupRule, format_figure
from monitor.core.eligibility.figures import AnimalFigures

OPEN, PASSED, UNKNOWN, NOT_PLATEAUED, NOT_YET = "open", "passed", "unknown", "not plateaued", "not yet"
TRAINING, WAITING, IN_WINDOW, WINDOW_PASSED, REVIEW = (
    "training", "waiting for a window", "in window", "window passed", "needs review")


@dataclass(frozen=True, slots=True)
class GroupStatus:
    """One group's window for one animal."""

    group: str
    label: str
    state: str  # OPEN | PASSED | UNKNOWN | NOT_PLATEAUED | NOT_YET
    met: tuple[str, ...]  # conditions that hold, in words
    unmet: tuple[str, ...]  # conditions that fail or cannot be judged, in words
    opens_in: tuple[int, int] | None = None
    closes_in: tuple[int, int] | None = None

    def to_dict(self) -> dict[str, Any]:
        return {"group": self.group, "label": self.label, "state": self.state, "met": list(self.met),
                "unmet": list(self.unmet), "opens_in": _pair(self.opens_in), "closes_in": _pair(self.closes_in)}


@dataclass(frozen=True, slots=True)
class Verdict:
    """The rule's verdict on one animal."""

    animal: str
    kind: str  # TRAINING | WAITING | IN_WINDOW | WINDOW_PASSED | REVIEW
    state: str  # the plain name shown, e.g. "in window: consolidated"
    open_groups: tuple[str, ...]
    groups: tuple[GroupStatus, ...]
    reason: str
    session: int | None
    protocol_version: int

    def status(self, group: str) -> GroupStatus | None:
        for status in self.groups:
            if status.group == group:
                return status
        return None

    def to_dict(self) -> dict[str, Any]:
        return {"animal": self.animal, "kind": self.kind, "state": self.state,
                "open_groups": list(self.open_groups), "groups": [g.to_dict() for g in self.groups],
                "reason": self.reason, "session": self.session, "protocol_version": self.protocol_version}


@dataclass(frozen=True, slots=True)
class WindowAlert:
    """A window that opened, closed, or is about to."""

    animal: str
    group: str
    label: str
    kind: str  # "opened" | "closed" | "closing" | "opening"
    sessions: tuple[int, int] | None
    message: str


def _pair(value: tuple[int, int] | None) -> list[int] | None:
    return None if value is None else list(value)


def sessions_text(span: tuple[int, int]) -> str:
    """'3 sessions', '2–4 sessions', '1 session'."""
    low, high = span
    unit = "session" if high == 1 else "sessions"
    return f"{low} {unit}" if low == high else f"{low}–{high} {unit}"


def _value_text(bound: Bound, value: float | None) -> str:
    """'CV 0.31 (needs ≤ 0.25)', 'CV not available (needs ≤ 0.25)'."""
    shown = "not available" if value is None else format_figure(value)
    return f"{DISPLAY[bound.figure]} {shown} (needs {bound.needs()})"


def _slow_value(figures: AnimalFigures, need: str) -> str:
    """'slow-state fraction 0.33 (0.23–0.43, estimated; needs ≤ 0.5)'; a point only when the status is
    "estimated", else the interval alone ('slow-state fraction: no point value (0.01–1.00, not constrained; ...)')."""
    point = f" {figures.slow_estimate:.2f}" if figures.slow_status == "estimated" else ": no point value"
    return (f"slow-state fraction{point} "
            f"({figures.slow_low:.2f}–{figures.slow_high:.2f}, {figures.slow_status}; needs {need})")


def _judge_slow(group: GroupRule, figures: AnimalFigures) -> tuple[str, str]:
    """(OPEN | PASSED | NOT_YET | UNKNOWN, words) for the model condition."""
    slow = group.slow
    assert slow is not None
    need = slow.bound.needs()
    if figures.slow_status not in slow.statuses:
        return UNKNOWN, (f"slow-state fraction status is {figures.slow_status or 'missing'!r} "
                         f"(accepted: {', '.join(slow.statuses)}; needs {need})")
    if None in (figures.slow_estimate, figures.slow_low, figures.slow_high):
        return UNKNOWN, f"slow-state fraction not available (needs {need})"
    if slow.basis == "estimate":
        low_side = high_side = figures.slow_estimate
    else:
        low_side, high_side = figures.slow_low, figures.slow_high
    words = _slow_value(figures, need)
    if slow.high is not None and low_side > slow.high:
        return PASSED, words  # even the conservative side is above the maximum
    if (slow.low is None or low_side >= slow.low) and (slow.high is None or high_side <= slow.high):
        return OPEN, words
    return NOT_YET, words


def _sessions_range(trials: float, per_session: tuple[float, float] | None) -> tuple[int, int] | None:
    """Sessions needed for `trials` more trials at the recent (fewest, most) trials per session."""
    if per_session is None:
        return None
    fewest, most = per_session
    return (max(1, math.ceil(trials / most)), max(1, math.ceil(trials / fewest)))


def _earliest(*spans: tuple[int, int] | None) -> tuple[int, int] | None:
    known = [s for s in spans if s is not None]
    return (min(s[0] for s in known), min(s[1] for s in known)) if known else None


def _latest(spans: list[tuple[int, int] | None]) -> tuple[int, int] | None:
    if not spans or any(s is None for s in spans):
        return None
    return (max(s[0] for s in spans), max(s[1] for s in spans))


def judge_group(group: GroupRule, figures: AnimalFigures) -> GroupStatus:
    """One group's window for these figures."""
    met: list[str] = []
    unmet: list[str] = []
    results: list[str] = []
    opening: list[tuple[int, int] | None] = []
    closing: list[tuple[int, int] | None] = []
    model = figures.forecast.get(group.name)
    if group.plateau:
        if not figures.plateau_reached:
            return GroupStatus(group.name, group.label, NOT_PLATEAUED, (),
                               ("plateau not reached in the final stage",))
        met.append(f"plateau at session {figures.plateau_session}")
    for bound in group.bounds:
        value = figures.measure(bound.figure)
        if value is None:
            results.append(UNKNOWN)
            unmet.append(_value_text(bound, None))
            continue
        if bound.holds(value):
            results.append(OPEN)
            met.append(_value_text(bound, value))
        else:
            grown_past = bound.figure in GROWING and bound.high is not None and value > bound.high
            results.append(PASSED if grown_past else NOT_YET)
            unmet.append(_value_text(bound, value))
        if bound.figure == "sessions_since_plateau":
            if bound.high is not None and value <= bound.high:
                closing.append((int(bound.high - value) + 1,) * 2)
            if bound.low is not None and value < bound.low:
                opening.append((int(bound.low - value),) * 2)
        elif bound.figure == "trials_since_plateau":
            if bound.high is not None and value <= bound.high:
                closing.append(_sessions_range(bound.high - value + 1, figures.trials_per_session))
            if bound.low is not None and value < bound.low:
                opening.append(_sessions_range(bound.low - value, figures.trials_per_session))
        elif not bound.holds(value):
            opening.append(None)  # a performance measure: no forecast of when it will hold
    if group.slow is not None:
        result, words = _judge_slow(group, figures)
        results.append(result)
        (met if result == OPEN else unmet).append(words)
        if result == OPEN:
            closing.append(model.closes_in if model else None)
        elif result != PASSED:
            opening.append(model.opens_in if model else None)
    if PASSED in results:
        state = PASSED
    elif all(r == OPEN for r in results):
        state = OPEN
    elif UNKNOWN in results:
        state = UNKNOWN
    else:
        state = NOT_YET
    return GroupStatus(group.name, group.label, state, tuple(met), tuple(unmet),
                       opens_in=_latest(opening) if state == NOT_YET else None,
                       closes_in=_earliest(*closing) if state == OPEN else None)


def evaluate(rule: EligibilityRule, figures: AnimalFigures) -> Verdict:
    """The rule's verdict on one animal (pure)."""
    statuses = tuple(judge_group(group, figures) for group in rule.groups)
    open_groups = tuple(s.group for s in statuses if s.state == OPEN)

    def verdict(kind: str, state: str, reason: str) -> Verdict:
        return Verdict(figures.animal, kind, state, open_groups if kind == IN_WINDOW else (), statuses,
                       reason, figures.session, figures.protocol_version)

    if rule.protocol_name is not None and figures.protocol_name != rule.protocol_name:
        return verdict(REVIEW, REVIEW, f"The figures come from protocol {figures.protocol_name!r} "
                                       f"but the rule belongs to {rule.protocol_name!r}.")
    if rule.protocol_version is not None and figures.protocol_version != rule.protocol_version:
        return verdict(REVIEW, REVIEW,
                       f"The figures come from protocol version {figures.protocol_version} "
                       f"but the rule belongs to version {rule.protocol_version}.")
    if open_groups:
        opened = [s for s in statuses if s.state == OPEN]
        parts = []
        for s in opened:
            closing = f", closing in {sessions_text(s.closes_in)}" if s.closes_in else ""
            parts.append(f"{s.label} ({'; '.join(s.met)}{closing})")
        return verdict(IN_WINDOW, "in window: " + ", ".join(s.label for s in opened),
                       f"Window open for {' and '.join(parts)}.")
    if all(s.state == NOT_PLATEAUED for s in statuses):
        where = f" (session {figures.session})" if figures.session is not None else ""
        return verdict(TRAINING, TRAINING, f"Plateau not reached in the final stage yet{where}.")
    blocked = [s for s in statuses if s.state == UNKNOWN]
    if blocked:
        s = blocked[0]
        return verdict(REVIEW, REVIEW, f"{s.label} cannot be judged: {'; '.join(s.unmet)}.")
    if all(s.state in (PASSED, NOT_PLATEAUED) for s in statuses):
        return verdict(WINDOW_PASSED, WINDOW_PASSED,
                       "Every window has passed: "
                       + "; ".join(f"{s.label}: {s.unmet[0]}" for s in statuses if s.state == PASSED) + ".")
    waiting = [s for s in statuses if s.state == NOT_YET]
    s = waiting[0]
    when = f", may open in {sessions_text(s.opens_in)}" if s.opens_in else ""
    plateau = f"Plateau at session {figures.plateau_session}; " if figures.plateau_reached else ""
    return verdict(WAITING, WAITING, f"{plateau}the window for \"{s.label}\" is not open yet: "
                                     f"{'; '.join(s.unmet)}{when}.")


def window_changes(previous: Verdict | None, current: Verdict, warn_sessions: int) -> tuple[WindowAlert, ...]:
    """Alerts for what changed between two verdicts on the same animal (None = first evaluation)."""
    alerts = []
    for status in current.groups:
        before = previous.status(status.group) if previous is not None else None
        was_open = previous is not None and status.group in previous.open_groups
        is_open = status.group in current.open_groups  # a verdict needing review opens nothing
        name = f"{current.animal}: window for {status.label}"
        if is_open and not was_open:
            alerts.append(WindowAlert(current.animal, status.group, status.label, "opened", status.closes_in,
                                      f"{name} opened" + (f", closing in {sessions_text(status.closes_in)}"
                                                          if status.closes_in else "") + "."))
        elif was_open and not is_open:
            why = status.unmet[0] if status.unmet else current.reason.rstrip(".")
            alerts.append(WindowAlert(current.animal, status.group, status.label, "closed", None,
                                      f"{name} closed ({why})."))
        elif is_open and status.closes_in is not None and status.closes_in[0] <= warn_sessions \
                and (before is None or before.closes_in != status.closes_in):
            alerts.append(WindowAlert(current.animal, status.group, status.label, "closing", status.closes_in,
                                      f"{name} closing in {sessions_text(status.closes_in)}."))
        if not is_open and status.opens_in is not None and status.opens_in[0] <= warn_sessions \
                and (before is None or before.opens_in != status.opens_in):
            alerts.append(WindowAlert(current.animal, status.group, status.label, "opening", status.opens_in,
                                      f"{name} may open in {sessions_text(status.opens_in)}."))
    return tuple(alerts)
