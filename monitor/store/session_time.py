"""A session's own clock: seconds after its start, on the device clock, shared by every export.

Rule: an event's session time is its device time relative to the session's
first event, clock segments (board resets) continuing from the last time seen
(the trial segmentation's rule, monitor.core.session.trials), plus the shift from the
session's `start_wall` to that first event (`start_device_us`: the device time
at which the start was taken; NULL: the first event itself). The trials CSV,
the events CSV and the NWB files all count time this way, so their times line
up. Wall-clock time is `start_wall` plus the session time, in the start's
UTC offset.
"""

from __future__ import annotations

import sqlite3
from datetime import datetime, timedelta
from typing import Iterable, Iterator

from drivers.wire import Event


class SessionClock:
    """Session-relative device time, fed one event at a time in stored order."""

    def __init__(self) -> None:
        self.started, self.segment, self.origin, self.base, self.last = False, 0, 0, 0, 0

    def relative(self, t_us: int, segment: int) -> int:
        if not self.started or segment != self.segment:
            self.started, self.segment, self.origin, self.base = True, segment, t_us, self.last
        rel = t_us - self.origin + self.base
        self.last = max(self.last, rel)
        return rel


def relative_us(events: Iterable[Event]) -> Iterator[tuple[Event, int]]:
    """Each event with its session-relative device time."""
    clock = SessionClock()
    for event in events:
        yield event, clock.relative(event.t_us, event.segment)


def start_shift_us(conn: sqlite3.Connection, session_id: int, first_t_us: int | None = None) -> int:
    """µs from the session's start_wall to its first event (0 when unknown or when it is the start)."""
    first_event, start_us = conn.execute("SELECT first_event, start_device_us FROM sessions WHERE id = ?",
                                         (session_id,)).fetchone()
    if start_us is None:
        return 0
    if first_t_us is None:
        row = (conn.execute("SELECT t_us FROM events WHERE rowid = ?", (first_event,)).fetchone()
               if first_event is not None else None) or conn.execute(
            "SELECT t_us FROM events WHERE session_id = ? ORDER BY rowid LIMIT 1", (session_id,)).fetchone()
        if row is None:
            return 0
        first_t_us = row[0]
    return int(first_t_us) - int(start_us)


def wall_clock(start: datetime, session_s: float) -> str:
    """ISO 8601 wall-clock time, with the start's UTC offset, `session_s` seconds after `start`."""
    return (start + timedelta(seconds=session_s)).isoformat(timespec="microseconds")
