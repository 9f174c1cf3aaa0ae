"""A session's own clock: seconds after its start, on the device clock, shared by every export.

Rule: an event's session time is its device time relative to the session's
first event, clock segments (board resets) continuing from the last time seen
(the trial segmentation's rule, monitor.core.session.trials), plus the shift from the
session's `start_wall` to that first event (`start_device_us`: the device time
at which the start was taken; NULL: the first event itself). The trials CSV,
the events CSV and the NWB files all count time this way, so their times line
up. Wall-clock time is `start_wall` plus the session time, in the start's
UTC offset. Times are whole microseconds; their texts are made a block of
events at a time (numpy), exactly as `f"{us / 1e6:.6f}"` and
`datetime.isoformat(timespec="microseconds")` would write each one.
"""

from __future__ import annotations

import functools
import sqlite3
from datetime import datetime, timedelta
from typing import Any

import numpy as np


class SessionClock:
    """Session-relative device time, fed blocks of one session's events in stored order."""

    def __init__(self) -> None:
        self.started, self.segment, self.origin, self.base, self.last = False, 0, 0, 0, 0

    def relative(self, t_us: np.ndarray, segment: np.ndarray) -> np.ndarray:
        """µs after the session's first event, for the next events (int64 arrays of equal length)."""
        t_us = np.asarray(t_us, dtype=np.int64)
        segment = np.asarray(segment, dtype=np.int64)
        out = np.empty(len(t_us), dtype=np.int64)
        if not len(t_us):
            return out
        change = segment != np.concatenate(([self.segment], segment[:-1]))
        change[0] |= not self.started
        edges = [0, *np.flatnonzero(change).tolist(), len(t_us)]
        for begin, end in zip(edges[:-1], edges[1:]):
            if end == begin:
                continue
            if change[begin]:  # a new segment continues from the last time seen
                self.started, self.segment, self.origin, self.base = True, int(segment[begin]), int(t_us[begin]), \
                    self.last
            run = t_us[begin:end] - self.origin + self.base
            out[begin:end] = run
            self.last = max(self.last, int(run.max()))
        return out


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


SECONDS = "%s%d.%06d"  # sign, whole seconds, microseconds: the text of `seconds_parts`


def seconds_parts(session_us: np.ndarray) -> tuple[list[str], list[int], list[int]]:
    """Each time's sign ("-" or ""), whole seconds and microseconds; `SECONDS % parts` is `f"{us / 1e6:.6f}"`."""
    session_us = np.asarray(session_us, dtype=np.int64)
    whole, micro = np.divmod(np.abs(session_us), 1_000_000)
    return np.where(session_us < 0, "-", "").tolist(), whole.tolist(), micro.tolist()


WALL = "%sT%s.%06d%s"  # date, "HH:MM:SS", microseconds, UTC offset: the text of `wall_clock_parts`


@functools.cache
def _clock_faces() -> np.ndarray:
    """"HH:MM:SS" of each second of a day, by the second: one lookup a row instead of three numbers to format."""
    return np.array([f"{h:02d}:{m:02d}:{s:02d}" for h in range(24) for m in range(60) for s in range(60)],
                    dtype=object)


def wall_clock_parts(start: datetime, session_us: np.ndarray) -> tuple[list[Any], ...]:
    """Each wall-clock time `session_us` µs after `start`, in the start's UTC offset, as the parts of `WALL`;
    `WALL % parts` is `(start + timedelta(microseconds=us)).isoformat(timespec="microseconds")`."""
    offset = start.isoformat()[19:].lstrip(".0123456789")  # "+01:00"; "" for a time without an offset
    local_us = (start.replace(tzinfo=None) - _EPOCH) // timedelta(microseconds=1) + np.asarray(session_us, np.int64)
    days, in_day = np.divmod(local_us, 86_400_000_000)
    seconds, micro = np.divmod(in_day, 1_000_000)
    distinct, which = np.unique(days, return_inverse=True)
    dates = np.array([(_EPOCH + timedelta(days=int(d))).date().isoformat() for d in distinct.tolist()], dtype=object)
    return dates[which].tolist(), _clock_faces()[seconds].tolist(), micro.tolist(), [offset] * len(local_us)


_EPOCH = datetime(1970, 1, 1)
