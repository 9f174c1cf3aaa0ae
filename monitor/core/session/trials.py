"""Trial segmentation from a session's event stream, one event at a time.

Rule: the rig is the witness. When the rig frames trials (`trial_start`) or
judges them (`outcome WORD`), its word is the trial's outcome and rigside's own
classification is kept beside it as a cross-check (disagreements counted and
kept). Otherwise rigside classifies from the protocol (docs/analysis.md):
two-press trials pair press onsets in order — a first press, then the next
press within `trial_timeout_ms` (else the first is a lone press); an interval
below `premature_ms` is premature; a hit lies at or inside the window edges,
decided exactly: the duration in integer device microseconds against the edges
as exact rationals of the numbers as written (protocol.exact).
Presses during the inter-trial interval (or, on rigs that frame trials, between
trials) are counted apart, as are omissions (a framed trial with no press).
Joystick-hold attempts run from a threshold crossing to the return below it;
pushes shorter than `min_hold_ms` are ignored as jitter. `param` events change
the stage, target and window in force; each trial carries those in force at its
first press. A new clock segment (board reset) never pairs presses across it.
A finished attempt waits for the rig's word: until its outcome, the next
attempt, or — on a rig that has sent no outcome yet — OUTCOME_GRACE_US after it
(then it is emitted as computed). Nothing in the stream raises: extra presses, missing releases, unknown events
and non-event records are counted. Each event costs O(1).
"""

from __future__ import annotations

import math
from collections import Counter
from fractions import Fraction
from typing import Any, NamedTuple

from monitor.core.protocol import TrainingProtocol, Stage, exact, tolerance_edges

NOT_TRIALS = frozenset({"lone", "premature", "omission"})
OUTCOME_GRACE_US = 500_000  # a rig outcome this soon after an attempt claims it (before any outcome was seen)
_WINDOW_PARAMS = ("window_low_ms", "window_high_ms")
_QUIET_EVENTS = frozenset({"reward", "valve", "lick", "cue", "session_start", "note"})  # known, not segmentation's
_STAGE_PARAMS = ("target_ms", "tolerance", "trial_timeout_ms", "iti_ms", "premature_ms", "min_hold_ms") + _WINDOW_PARAMS


class Trial(NamedTuple):
    """One attempt of a session: a completed trial, or a lone, premature or omitted one."""

    index: int  # 1-based, over all records of the session
    t_us: int  # session-relative device time of the first press / crossing / trial start
    interval_ms: float  # inter-press interval or hold time; nan when there is none
    target_ms: float
    window_low_ms: float
    window_high_ms: float
    stage: str
    outcome: str  # the rig's word when it sent one, else computed_outcome
    rewarded: bool
    outcome_source: str  # "rig" | "computed"
    computed_outcome: str  # rigside's own classification
    segment: int  # clock segment of the first press

    @property
    def completed(self) -> bool:
        """A completed trial (lone, premature and omitted attempts are counted apart)."""
        return self.outcome not in NOT_TRIALS


class _Rules(NamedTuple):
    """The stage, target and window in force, captured at a first press."""

    stage: str
    target_ms: float
    low_ms: float
    high_ms: float
    low_us: int  # the edges in whole device microseconds: ceil(exact low), floor(exact high)
    high_us: int


class _Attempt(NamedTuple):
    t_us: int
    interval_ms: float
    computed: str
    rules: _Rules
    segment: int
    end_us: int  # when the attempt was complete (a rig's outcome follows soon after)


class TrialBuilder:
    """Feed one session stream's events in order; get Trial records back."""

    def __init__(self, protocol: TrainingProtocol, stage: str | None = None) -> None:
        self.protocol = protocol
        self.counts: Counter[str] = Counter()
        self.disagreements: list[tuple[int, str, str]] = []  # (trial index, rig word, computed word)
        self.other_params: dict[str, str] = {}
        self._hit_words = frozenset(protocol.hit_words)
        self._index = 0
        self._started = False
        self._segment = 0
        self._origin = 0  # device time of the segment's first event
        self._base = 0  # session-relative time at which the segment starts
        self._last_rel = 0
        self._first: tuple[int, _Rules, int] | None = None  # (t, rules, segment) of an unpaired press
        self._pending: _Attempt | None = None  # waits for the rig's outcome
        self._awaits_rig = False  # the rig sends outcomes: computed attempts wait for them
        self._framed = False  # the rig sends trial_start
        self._open = False  # inside a rig-framed trial
        self._trial_t = 0
        self._iti_until = -1
        self._down: set[str] = set()
        self._push: int | None = None  # joystick: time of the crossing
        self._push_rules = self._push_segment = None
        self._push_blocked = False  # joystick: a push that began between trials
        self._window_from_rig = False
        self._adapt_trials = 0
        self._adapt_hits = 0
        first = protocol.stages[0] if stage is None else protocol.stage(stage)
        if first is None:
            first = protocol.stages[0]
            self.counts["unknown_stage"] += 1
        self._load_stage(first, stage or first.name)
        self._dispatch = {
            "lever_down": self._on_press,
            "lever_up": self._on_release,
            "trial_start": self._on_trial_start,
            "outcome": self._on_outcome,
            "param": self._on_param,
            "joystick": self._on_joystick,
            "session_end": self._on_session_end,
        }

    # -- public -----------------------------------------------------------

    @property
    def stage(self) -> str:
        """The stage in force now."""
        return self._stage

    @property
    def window_in_force(self) -> tuple[float, float, float]:
        """(target, low, high) in ms in force now: what the next trial will be judged by."""
        return self._target, self._low, self._high

    @property
    def window_from_rig(self) -> bool:
        """Whether the rig itself sent the window in force (`param window_low_ms` / `window_high_ms`)."""
        return self._window_from_rig

    def feed(self, event: Any) -> list[Trial]:
        """Take the next event; return the trials it completes (often none)."""
        name = getattr(event, "name", None)
        t_raw = getattr(event, "t_us", None)
        if not isinstance(name, str) or not isinstance(t_raw, int):
            self.counts["non_event"] += 1
            return []
        out: list[Trial] = []
        segment = getattr(event, "segment", 0)
        if self._started and segment == self._segment:  # the common case of `_relative`, inline (hot path)
            t = t_raw - self._origin + self._base
            if t > self._last_rel:
                self._last_rel = t
        else:
            t = self._relative(t_raw, segment, out)
        if self._pending is not None or self._first is not None:
            self._expire(t, out)
        handler = self._dispatch.get(name)
        if handler is not None:
            handler(t, event.args, out)
        elif name not in _QUIET_EVENTS:
            self.counts["unknown_event"] += 1
        return out

    def flush(self) -> list[Trial]:
        """End of the session: close what is still open (lone press, trial without outcome)."""
        out: list[Trial] = []
        self._close_open(out, at_end=True)
        if self._push is not None:
            self.counts["open_at_end"] += 1
            self._push = None
        return out

    # -- time and segments ------------------------------------------------

    def _relative(self, t_us: int, segment: int, out: list[Trial]) -> int:
        if not self._started or segment != self._segment:
            if self._started:
                self._reset(out)
            self._started = True
            self._segment = segment
            self._origin = t_us
            self._base = self._last_rel
        rel = t_us - self._origin + self._base
        self._last_rel = max(self._last_rel, rel)
        return rel

    def _reset(self, out: list[Trial]) -> None:
        """A new clock segment (board reset): close everything, pair nothing across it."""
        self.counts["segments"] += 1
        if self._first is not None:
            self._lone(out)
        self._pending_to(out)
        if self._open:
            self.counts["unfinished"] += 1
            self._open = False
        if self._push is not None:
            self.counts["open_at_reset"] += 1
            self._push = None
        self._down.clear()

    # -- rules in force ---------------------------------------------------

    def _load_stage(self, stage: Stage, name: str) -> None:
        self._stage = name
        self._target = stage.target_ms
        self._tolerance = stage.tolerance
        if stage.tolerance is None:
            self._set_window(exact(stage.window_low_ms), exact(stage.window_high_ms))
        else:
            self._set_window(*tolerance_edges(stage.target_ms, stage.tolerance))
        self._adaptive = stage.adaptive
        self._timeout_us = stage.trial_timeout_ms * 1000.0
        self._iti_us = stage.iti_ms * 1000.0
        self._premature_us = math.ceil(exact(stage.premature_ms) * 1000)
        self._min_hold = stage.min_hold_ms
        self._adapt_trials = self._adapt_hits = 0

    def _set_window(self, low: Fraction, high: Fraction) -> None:
        """The window in force, from its exact edges in ms."""
        self._low_x, self._high_x = low, high
        self._low, self._high = float(low), float(high)
        self._low_us, self._high_us = math.ceil(low * 1000), math.floor(high * 1000)

    def _rules(self) -> _Rules:
        return _Rules(self._stage, self._target, self._low, self._high, self._low_us, self._high_us)

    def _classify(self, duration_us: int, rules: _Rules) -> str:
        """Premature, hit or miss of a duration in integer device microseconds (exact: integer edges)."""
        if duration_us < self._premature_us:
            return "premature"
        return "hit" if rules.low_us <= duration_us <= rules.high_us else "miss"

    def _on_param(self, t: int, args: tuple[str, ...], out: list[Trial]) -> None:
        name, value = args[0], args[1]
        if name == "stage":
            stage = self.protocol.stage(value)
            if stage is None:
                self.counts["unknown_stage"] += 1
                self._stage = value
            else:
                self._load_stage(stage, value)
            self._window_from_rig = False
            return
        if name not in _STAGE_PARAMS:
            self.other_params[name] = value
            self.counts["other_param"] += 1
            return
        try:
            number = float(value)
        except ValueError:
            number = math.nan
        if not math.isfinite(number) or number < 0:
            self.counts["bad_param"] += 1
            return
        if name == "target_ms":
            self._target = number
            if self._tolerance is not None and not self._window_from_rig:
                self._set_window(*tolerance_edges(number, self._tolerance))
        elif name == "tolerance":
            self._tolerance = number
            self._set_window(*tolerance_edges(self._target, number))
        elif name == "window_low_ms":
            self._set_window(exact(number), self._high_x)
            self._window_from_rig = True
        elif name == "window_high_ms":
            self._set_window(self._low_x, exact(number))
            self._window_from_rig = True
        elif name == "trial_timeout_ms":
            self._timeout_us = number * 1000.0
        elif name == "iti_ms":
            self._iti_us = number * 1000.0
        elif name == "premature_ms":
            self._premature_us = math.ceil(exact(number) * 1000)
        else:
            self._min_hold = number

    def _adapt(self, trial: Trial) -> None:
        """Fallback only: step the tolerance every `every` trials to hold the target rate."""
        rule = self._adaptive
        if rule is None or self._window_from_rig or self._tolerance is None or not trial.completed:
            return
        if trial.stage != self._stage:
            return
        self._adapt_trials += 1
        self._adapt_hits += trial.rewarded
        if self._adapt_trials < rule.every:
            return
        rate = self._adapt_hits / self._adapt_trials
        self._adapt_trials = self._adapt_hits = 0
        tolerance, step = exact(self._tolerance), exact(rule.step)  # exact steps: 0.2 - 0.05 is 0.15
        if rate > rule.target_rate:
            tolerance = max(exact(rule.min_tolerance), tolerance - step)
        elif rate < rule.target_rate:
            tolerance = min(exact(rule.max_tolerance), tolerance + step)
        self._tolerance = float(tolerance)
        self._set_window(*tolerance_edges(self._target, self._tolerance))

    # -- emitting ---------------------------------------------------------

    def _emit(self, attempt: _Attempt, out: list[Trial], rig_word: str | None = None) -> None:
        self._index += 1
        if rig_word is None:
            outcome, source = attempt.computed, "computed"
            rewarded = outcome == "hit"
        else:
            outcome, source = rig_word, "rig"
            rewarded = rig_word in self._hit_words
            normal = "hit" if rewarded else rig_word
            if normal != attempt.computed:
                self.counts["disagreements"] += 1
                self.disagreements.append((self._index, rig_word, attempt.computed))
        rules = attempt.rules
        trial = Trial(self._index, attempt.t_us, attempt.interval_ms, rules.target_ms, rules.low_ms, rules.high_ms,
                      rules.stage, outcome, rewarded, source, attempt.computed, attempt.segment)
        self.counts[outcome if outcome in NOT_TRIALS else "trials"] += 1
        out.append(trial)
        self._adapt(trial)

    def _pending_to(self, out: list[Trial]) -> None:
        """A computed attempt whose rig outcome never came: emit it as computed."""
        if self._pending is not None:
            if self._open or self._awaits_rig:
                self.counts["missing_outcome"] += 1
            self._emit(self._pending, out)
            self._pending = None

    def _attempt(self, attempt: _Attempt, out: list[Trial]) -> None:
        """A finished attempt waits for the rig's word: until the outcome, the next
        attempt or trial start, or (before any outcome was seen) OUTCOME_GRACE_US."""
        self._pending_to(out)
        self._pending = attempt

    def _lone(self, out: list[Trial]) -> None:
        t, rules, segment = self._first  # type: ignore[misc]
        self._first = None
        self._attempt(_Attempt(t, math.nan, "lone", rules, segment, t + int(self._timeout_us)), out)

    def _expire(self, t: int, out: list[Trial]) -> None:
        pending = self._pending
        if pending is not None and not (self._open or self._awaits_rig) and t - pending.end_us > OUTCOME_GRACE_US:
            self._pending_to(out)
        if self._first is not None and t - self._first[0] > self._timeout_us:
            self._lone(out)

    def _close_open(self, out: list[Trial], at_end: bool = False) -> None:
        """Close a rig trial that ends without the rig's outcome."""
        if self._first is not None:
            self._lone(out)
        if self._pending is not None:
            self._pending_to(out)
        elif self._open and not at_end:
            self.counts["missing_outcome"] += 1
            self._emit(_Attempt(self._trial_t, math.nan, "omission", self._rules(), self._segment, self._trial_t), out)
        elif self._open:
            self.counts["unfinished"] += 1
        self._open = False

    # -- handlers ---------------------------------------------------------

    def _gate(self, t: int) -> bool:
        """May an attempt start now? Counts an inter-trial press when not."""
        if (self._framed and not self._open) or (not self._framed and t < self._iti_until):
            self.counts["inter_trial"] += 1
            return False
        if self._framed and self._pending is not None:
            self.counts["extra_press"] += 1
            return False
        return True

    def _on_press(self, t: int, args: tuple[str, ...], out: list[Trial]) -> None:
        self.counts["presses"] += 1
        lever = args[0] if args else "1"
        if lever in self._down:
            self.counts["missing_release"] += 1
        self._down.add(lever)
        if self.protocol.task != "two_press" or not self._gate(t):
            return
        if self._first is None:
            self._first = (t, self._rules(), self._segment)
            return
        first_t, rules, segment = self._first
        if t < first_t:
            self.counts["out_of_order"] += 1
            return
        self._first = None
        interval = (t - first_t) / 1000.0
        self._attempt(_Attempt(first_t, interval, self._classify(t - first_t, rules), rules, segment, t), out)
        if not self._framed:
            self._iti_until = t + self._iti_us

    def _on_release(self, t: int, args: tuple[str, ...], out: list[Trial]) -> None:
        lever = args[0] if args else "1"
        if lever in self._down:
            self._down.discard(lever)
            self.counts["releases"] += 1
        else:
            self.counts["unmatched_release"] += 1

    def _on_joystick(self, t: int, args: tuple[str, ...], out: list[Trial]) -> None:
        if self.protocol.task != "joystick_hold":
            self.counts["joystick_ignored"] += 1
            return
        x = float(args[0])
        y = float(args[1]) if len(args) > 1 else 0.0
        above = math.hypot(x, y) >= self.protocol.threshold_deg
        if self._push is None:
            if not above:
                self._push_blocked = False
            elif not self._push_blocked:
                if self._gate(t):
                    self._push, self._push_rules, self._push_segment = t, self._rules(), self._segment
                    self.counts["pushes"] += 1
                else:
                    self._push_blocked = True
            return
        if above:
            return
        hold = (t - self._push) / 1000.0
        start, rules, segment = self._push, self._push_rules, self._push_segment
        self._push = None
        if hold < self._min_hold:
            self.counts["short_push"] += 1
            return
        self._attempt(_Attempt(start, hold, self._classify(t - start, rules), rules, segment, t), out)
        if not self._framed:
            self._iti_until = t + self._iti_us

    def _on_trial_start(self, t: int, args: tuple[str, ...], out: list[Trial]) -> None:
        if self._open:
            self._close_open(out)
        else:
            if self._first is not None:
                self._lone(out)
            self._pending_to(out)
        self._framed = self._open = True
        self._trial_t = t

    def _on_outcome(self, t: int, args: tuple[str, ...], out: list[Trial]) -> None:
        word = args[0]
        self._awaits_rig = True
        if self._pending is not None:
            attempt = self._pending
        elif self._first is not None:
            first_t, rules, segment = self._first
            attempt = _Attempt(first_t, math.nan, "lone", rules, segment, t)
            self._first = None
        elif self._open:
            attempt = _Attempt(self._trial_t, math.nan, "omission", self._rules(), self._segment, t)
        else:
            self.counts["late_outcome"] += 1  # judges an attempt already emitted as computed
            return
        self._pending = None
        self._open = False
        self._emit(attempt, out, word)

    def _on_session_end(self, t: int, args: tuple[str, ...], out: list[Trial]) -> None:
        out.extend(self.flush())


def build_trials(protocol: TrainingProtocol, events, stage: str | None = None) -> tuple[list[Trial], TrialBuilder]:
    """Segment a whole recorded session (the same rules, all at once)."""
    builder = TrialBuilder(protocol, stage)
    trials: list[Trial] = []
    for event in events:
        trials.extend(builder.feed(event))
    trials.extend(builder.flush())
    return trials, builder
