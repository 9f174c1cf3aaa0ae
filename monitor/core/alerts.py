"""Alert rules for one rig: pure state machines fed observations, returning alerts.

Rule: a `RigWatch` is told what happened (an event, a change of the link, the
counts of malformed lines and of disagreements with the rig, a session
starting or ending) with the host's monotonic time `now` in seconds, and
`tick(now)` checks what depends on time passing. Each returns the alerts that
became true just then; an alert fires once when its condition starts and is
re-armed when the condition clears (a silent rig that speaks again, a lever
released, a burst that died down), so a lasting condition never floods the
list. Repeatable alerts (valve, disagreement) fire at most once per
`repeat_s`. Severities: urgent = a person is needed now (device gone for good,
valve open too long, lever held, store failure); attention = look soon
(silent, retrying, malformed bursts, disagreements); info = worth knowing
(plateau reached, reconnected). Thresholds are `AlertRules`, checked by
`AlertRules.problems()`. Device durations use device time; "still held now"
uses host time times `clock_rate` (device seconds per host second).
"""

from __future__ import annotations

import math
from collections import deque
from dataclasses import dataclass, fields
from typing import NamedTuple

URGENT = "urgent"
ATTENTION = "attention"
INFO = "info"

LINK_UP = "up"        # open and reading (or silent but open)
LINK_DOWN = "down"    # lost, being retried
LINK_ENDED = "ended"  # the reader stopped on an error: it will not come back by itself


@dataclass(frozen=True)
class AlertRules:
    """Thresholds of the alert rules (all configurable; defaults are our own, common practice)."""

    silent_minutes: float = 5.0        # no event for this long during a session
    lever_held_s: float = 10.0         # a lever down longer than this
    valve_max_ms: float = 250.0        # one valve opening longer than this (docs/care.md's default)
    gone_after_s: float = 60.0         # disconnected this long: gone for good
    malformed_burst: int = 10          # this many malformed lines ...
    malformed_window_s: float = 60.0   # ... within this many seconds
    repeat_s: float = 60.0             # a repeatable alert fires at most once per this
    clock_rate: float = 1.0            # device seconds per host second (a demo runs faster)
    unattended_presses: int = 3        # presses with nobody checked in before the box is flagged

    def problems(self) -> list[str]:
        """What is wrong with these thresholds, one sentence each (empty when fine)."""
        out = []
        for f in fields(self):
            value = getattr(self, f.name)
            if not (isinstance(value, (int, float)) and math.isfinite(value) and value > 0):
                out.append(f"{f.name} must be a number above 0, got {value!r}")
        if isinstance(self.malformed_burst, float) and not self.malformed_burst.is_integer():
            out.append(f"malformed_burst must be a whole number, got {self.malformed_burst!r}")
        return out


ACTIVITY_EVENTS = ("lever_down", "joystick", "trial_start")   # an animal (or a stuck lever) at work


class Raised(NamedTuple):
    """One alert that just became true."""

    kind: str
    severity: str
    text: str


class RigWatch:
    """The alert rules of one rig; not thread-safe (one owner thread)."""

    def __init__(self, rules: AlertRules = AlertRules()) -> None:
        self.rules = rules
        self.in_session = False
        self._last_data: float | None = None
        self._silent_fired = False
        self._held: dict[str, tuple[int, float, bool]] = {}   # lever -> (t_us down, host down, fired)
        self._last_fired: dict[str, float] = {}
        self._link = LINK_UP
        self._down_since: float | None = None
        self._gone_fired = False
        self._malformed_total: int | None = None
        self._bursts: deque[tuple[float, int]] = deque()
        self._burst_count = 0
        self._burst_fired = False
        self._disagreements = 0
        self._unattended_fired = False

    # --- observations ------------------------------------------------------------
    def session(self, running: bool, now: float) -> None:
        """A session started (running) or ended; silence is judged within sessions only."""
        self.in_session = running
        self._unattended_fired = False
        self._last_data = now
        self._silent_fired = False
        self._held.clear()

    def data(self, now: float) -> None:
        """Bytes arrived (events or not): the rig is not silent."""
        self._last_data = now
        self._silent_fired = False

    def event(self, name: str, args: tuple[str, ...], t_us: int, now: float) -> list[Raised]:
        """One decoded event."""
        if name == "lever_down":
            lever = args[0] if args else "1"
            if lever not in self._held:
                self._held[lever] = (t_us, now, False)
        elif name == "lever_up":
            lever = args[0] if args else "1"
            held = self._held.pop(lever, None)
            if held is not None and not held[2]:
                seconds = (t_us - held[0]) / 1e6
                if seconds > self.rules.lever_held_s:
                    return [Raised("lever held", URGENT, f"lever {lever} was held down for {seconds:.1f} s "
                                   f"(limit {self.rules.lever_held_s:g} s)")]
        elif name == "valve" and args:
            try:
                ms = float(args[0])
            except ValueError:
                return []
            if ms > self.rules.valve_max_ms and self._may_repeat("valve open too long", now):
                return [Raised("valve open too long", URGENT, f"valve opened for {ms:g} ms "
                               f"(limit {self.rules.valve_max_ms:g} ms): check the valve and the water line")]
        return []

    def link(self, state: str, now: float) -> list[Raised]:
        """The source's link: LINK_UP, LINK_DOWN or LINK_ENDED."""
        old, self._link = self._link, state
        if state == old:
            return []
        if state == LINK_UP:
            gone = self._down_since
            self._down_since, self._gone_fired = None, False
            self.data(now)
            if old == LINK_DOWN and gone is not None:
                return [Raised("reconnected", INFO, f"reconnected after {now - gone:.1f} s")]
            return []
        if state == LINK_ENDED:
            self._gone_fired = True
            return [Raised("device gone", URGENT, "the reader stopped on an error and will not retry: "
                           "check the cable and restart the source")]
        self._down_since = now
        return [Raised("disconnected", ATTENTION, "disconnected: retrying (reopening the port or file)")]

    def malformed(self, total: int, now: float) -> list[Raised]:
        """The source's running count of malformed lines."""
        if self._malformed_total is None or total < self._malformed_total:
            self._malformed_total = total
            return []
        new, self._malformed_total = total - self._malformed_total, total
        if new:
            self._bursts.append((now, new))
            self._burst_count += new
        self._expire_bursts(now)
        if self._burst_count >= self.rules.malformed_burst and not self._burst_fired:
            self._burst_fired = True
            return [Raised("malformed lines", ATTENTION, f"{self._burst_count} malformed lines in the last "
                           f"{self.rules.malformed_window_s:g} s: check the cable, baud rate or firmware")]
        return []

    def disagreements(self, total: int, latest: str, now: float) -> list[Raised]:
        """The running count of trials where the rig's outcome and rigside's differ."""
        new, self._disagreements = total - self._disagreements, total
        if new > 0 and self._may_repeat("disagreement", now):
            trials = "1 trial" if total == 1 else f"{total} trials"
            return [Raised("disagreement", ATTENTION, f"rig and rigside disagree on {trials} this "
                           f"session (latest: {latest}): check the protocol file against the rig's program")]
        return []

    def forget_unattended(self) -> None:
        """The box's unattended presses were given to an animal: flag afresh."""
        self._unattended_fired = False

    def unattended(self, presses: int) -> list[Raised]:
        """Presses, pushes or trial starts while nobody is checked in: flagged once until the next session."""
        if self.in_session or self._unattended_fired or presses < self.rules.unattended_presses:
            return []
        self._unattended_fired = True
        return [Raised("nobody checked in", ATTENTION, f"the box is running ({presses} presses or trials) with "
                       "nobody checked in: check the animal in, or give these trials to it afterwards "
                       "(Rigs, Give unattended trials)")]

    def tick(self, now: float) -> list[Raised]:
        """Rules that fire because time passed: silence, a lever still held, a device gone."""
        out: list[Raised] = []
        rules = self.rules
        if (self.in_session and self._link == LINK_UP and self._last_data is not None
                and not self._silent_fired and now - self._last_data >= rules.silent_minutes * 60):
            self._silent_fired = True
            out.append(Raised("silent", ATTENTION, f"no data for {rules.silent_minutes:g} min during a session: "
                              "is the animal engaged, is the box running?"))
        for lever, (t_us, down, fired) in list(self._held.items()):
            held_s = (now - down) * rules.clock_rate
            if not fired and held_s > rules.lever_held_s:
                self._held[lever] = (t_us, down, True)
                out.append(Raised("lever held", URGENT, f"lever {lever} held down for more than "
                                  f"{rules.lever_held_s:g} s: stuck lever or an animal on it?"))
        if (self._link == LINK_DOWN and self._down_since is not None and not self._gone_fired
                and now - self._down_since >= rules.gone_after_s):
            self._gone_fired = True
            out.append(Raised("device gone", URGENT, f"disconnected for {now - self._down_since:.0f} s: "
                              "the device has not come back"))
        self._expire_bursts(now)
        return out

    # --- helpers -------------------------------------------------------------------
    def _may_repeat(self, kind: str, now: float) -> bool:
        last = self._last_fired.get(kind)
        if last is not None and now - last < self.rules.repeat_s:
            return False
        self._last_fired[kind] = now
        return True

    def _expire_bursts(self, now: float) -> None:
        while self._bursts and now - self._bursts[0][0] > self.rules.malformed_window_s:
            self._burst_count -= self._bursts.popleft()[1]
        if self._burst_count < self.rules.malformed_burst:
            self._burst_fired = False


def plateau_alert(was_reached: bool | None, reached: bool, session: int | None, reason: str) -> Raised | None:
    """Info when the plateau criterion becomes met (None before the first verdict is known)."""
    if was_reached is None or was_reached or not reached:
        return None
    where = f" at session {session}" if session is not None else ""
    return Raised("plateau reached", INFO, f"plateau criterion met{where}: {reason}")


def store_alert(was_failing: bool, failing: bool, text: str) -> Raised | None:
    """Urgent when the store writer starts failing or overflowing (events not being saved)."""
    if failing and not was_failing:
        return Raised("store failure", URGENT, f"events are not being saved: {text}")
    return None
