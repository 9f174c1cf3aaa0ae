"""Water an animal earned in one session, from the rig's own events.

Rule: each `reward UL` adds UL µL; a bare `reward` adds the protocol's reward
size (`reward_ul`); `valve MS` adds MS × the rig's calibration (µL/ms), the
same rule as the live statistics (a rig should report a drop once, as one or
the other). A delivery whose volume cannot be known (bad number, no reward
size, no calibration, or more than the protocol's `max_reward_ul`) is
counted, never guessed. Licks confirm: a delivery
with no lick within `lick_window_ms` after it (same clock segment) counts as
unconfirmed. A valve opened longer than `max_valve_ms` is listed. Device time
only; pure.
"""

from __future__ import annotations

import math
from bisect import bisect_left
from dataclasses import dataclass
from datetime import datetime
from typing import Iterable

from drivers.wire import Event

DELIVERIES = ("reward", "valve")


@dataclass(frozen=True, slots=True)
class SessionWater:
    """One session's water and the checks on it."""

    session: str
    end: datetime | None  # when the water was earned (session end), aware
    earned_ul: float
    deliveries: int
    unconfirmed: int  # deliveries with no lick within the window
    licks: int
    unknown_volume: int
    long_valves_ms: tuple[float, ...]
    start: datetime | None = None  # when the session began (a session with no end is still running)

    @property
    def earned_ml(self) -> float:
        return self.earned_ul / 1000.0


def _number(text: str) -> float | None:
    try:
        value = float(text)
    except ValueError:
        return None
    return value if math.isfinite(value) and value >= 0 else None


def session_water(events: Iterable[Event], *, ul_per_ms: float | None, reward_ul: float | None,
                  max_valve_ms: float, lick_window_ms: float, session: str = "",
                  end: datetime | None = None, max_reward_ul: float | None = None) -> SessionWater:
    """Sum a session's deliveries and check them against licks and the valve limit."""
    earned = 0.0
    unknown = 0
    long_valves: list[float] = []
    deliveries: list[tuple[int, int]] = []  # (segment, t_us)
    licks: dict[int, list[int]] = {}
    for event in events:
        if event.name == "lick":
            licks.setdefault(event.segment, []).append(event.t_us)
        elif event.name in DELIVERIES:
            deliveries.append((event.segment, event.t_us))
            value = _number(event.args[0]) if event.args else None
            if event.name == "reward":
                volume = value if event.args else reward_ul
            else:
                if value is not None and value > max_valve_ms:
                    long_valves.append(value)
                volume = None if value is None or ul_per_ms is None else value * ul_per_ms
            if volume is None or (max_reward_ul is not None and volume > max_reward_ul):
                unknown += 1
            else:
                earned += volume
    for times in licks.values():
        times.sort()
    window_us = lick_window_ms * 1000.0
    unconfirmed = 0
    for segment, t in deliveries:
        times = licks.get(segment, [])
        i = bisect_left(times, t)
        if i == len(times) or times[i] - t > window_us:
            unconfirmed += 1
    return SessionWater(session, end, earned, len(deliveries), unconfirmed,
                        sum(len(t) for t in licks.values()), unknown, tuple(long_valves))
