"""The events and trials CSVs, streamed from the store a block of rows at a time.

Rule: events: a header row, then one row per event in the order it was stored
(EVENT_COLUMNS): `animal`, `session`, `rig`, `segment`, `line`,
`device_time` (the counter as the rig sent it), `t_us` (unwrapped device time
in µs within the segment), `session_time_s` (seconds after the session's
start on the device clock: the trials CSV's origin, monitor.store.session_time),
`wall_time` (ISO 8601 with the session's UTC offset), `event`, `value`.
Trials: one row per derived trial (TRIAL_CSV_COLUMNS), sessions in time order,
excluded sessions included with their flag. Rows are read and written
BLOCK_ROWS at a time and each block's times are computed a column at a time
(a session clock per session, carried from block to block), so memory does
not grow with the number of events. A CSV is written under a temporary name
and renamed when complete. A cell that begins with = + - @ (or a tab or
carriage return) and is not a number gets a leading apostrophe, so a
spreadsheet shows it instead of running it.
"""

from __future__ import annotations

import contextlib
import csv
import io
import os
import re
import sqlite3
from datetime import datetime
from pathlib import Path
from typing import Any, Callable, Iterator, TextIO

from monitor.store.event_blocks import BLOCK_ROWS
from monitor.store.twins import twin

EVENT_COLUMNS = ("animal", "session", "rig", "segment", "line", "device_time", "t_us", "session_time_s",
                 "wall_time", "event", "value")
TRIAL_CSV_COLUMNS = ("animal", "session", "session_start", "rig", "label", "excluded", "trial", "t_us",
                     "session_time_s",
                     "interval_ms", "outcome", "rewarded", "outcome_source", "computed_outcome", "target_ms",
                     "window_low_ms", "window_high_ms", "stage", "segment")
_NUMBER = re.compile(r"^[+-]?(\d+(\.\d*)?|\.\d+)([eE][+-]?\d+)?$")
_FORMULA_START = ("=", "+", "-", "@", "\t", "\r")

_TRIALS_SQL = """
SELECT s.animal, s.id, s.start_wall, s.rig, s.label, s.excluded, t.idx, t.t_us, t.interval_ms, t.outcome,
       t.rewarded, t.outcome_source, t.computed_outcome, t.target_ms, t.window_low_ms, t.window_high_ms,
       t.stage, t.segment
FROM sessions AS s JOIN trials AS t ON t.session_id = s.id
ORDER BY s.animal, s.started_at, s.id, t.idx
"""


def safe_cell(value: object) -> object:
    """The value, or text that a spreadsheet will not read as a formula."""
    if isinstance(value, str) and value.startswith(_FORMULA_START) and not _NUMBER.match(value):
        return "'" + value
    return "" if value is None else value


@contextlib.contextmanager
def atomic_file(path: Path) -> Iterator[TextIO]:
    """`path`'s temporary twin (monitor.store.twins), open for writing; renamed to `path` when the block ends
    without error."""
    part = twin(path)
    try:
        with open(part, "w", newline="", encoding="utf-8") as out:
            yield out
        os.replace(part, path)
    finally:
        part.unlink(missing_ok=True)


class _Session:
    """What each event row of one session shares: its names, clock, shift and start."""

    def __init__(self, conn: sqlite3.Connection, session_id: int, first_t_us: int) -> None:
        from monitor.store.session_time import SessionClock, start_shift_us

        animal, rig, start_wall = conn.execute("SELECT animal, rig, start_wall FROM sessions WHERE id = ?",
                                               (session_id,)).fetchone()
        self.names = f"{safe_cell(animal)},{session_id},{safe_cell(rig)}"  # the row's first three cells
        self.start = datetime.fromisoformat(start_wall)
        self.shift_us = start_shift_us(conn, session_id, first_t_us)
        self.clock = SessionClock()


def write_events_csv(conn: sqlite3.Connection, path: Path, tick: Callable[[int], None] | None = None,
                     block_rows: int = BLOCK_ROWS) -> int:
    """Stream every event to `path`, `block_rows` at a time; return the rows written (`tick(rows)` after each
    block; an exception it raises removes the unfinished file)."""
    import numpy as np

    from monitor.store.event_blocks import event_blocks, event_words  # numpy: when a CSV is written
    from monitor.store.session_time import SECONDS, WALL, seconds_parts, wall_clock_parts

    line = f"%s,%d,%d,%d,%d,{SECONDS},{WALL},%s,%s\r\n"  # the session's names (animal, session, rig) first
    words = {code: _cell(word) for code, word in event_words(conn).items()}
    sessions: dict[int, _Session] = {}
    count = 0
    with atomic_file(path) as out:
        csv.writer(out).writerow(EVENT_COLUMNS)
        for block in event_blocks(conn, size=block_rows):
            n = len(block)
            ids, t_us, segment = block.array("session"), block.array("t_us"), block.array("segment")
            session_us = np.empty(n, dtype=np.int64)
            names = np.empty(n, dtype=object)
            wall: list[Any] = [np.empty(n, dtype=object) for _ in range(4)]
            for session_id in np.unique(ids).tolist():
                rows = ids == session_id
                session = sessions.get(session_id)
                if session is None:
                    session = sessions[session_id] = _Session(conn, session_id, int(t_us[rows][0]))
                here = session.shift_us + session.clock.relative(t_us[rows], segment[rows])
                session_us[rows] = here
                names[rows] = session.names
                for column, part in zip(wall, wall_clock_parts(session.start, here)):
                    column[rows] = part
            texts: dict[str | None, str] = {}  # one block's distinct values (text or None), each checked once
            values = [texts[v] if v in texts else texts.setdefault(v, _cell(v)) for v in block.value]
            out.write("".join([line % row for row in zip(
                names.tolist(), block.segment, block.line, block.raw_time, block.t_us,
                *seconds_parts(session_us), *(column.tolist() for column in wall), [words[c] for c in block.code],
                values)]))
            count += n
            if tick is not None:
                tick(count)
    return count


def write_trials_csv(conn: sqlite3.Connection, path: Path, tick: Callable[[int], None] | None = None,
                     block_rows: int = BLOCK_ROWS) -> int:
    """Stream every derived trial to `path`, `block_rows` at a time; return the rows written (`tick(rows)`
    after each block)."""
    import numpy as np

    from monitor.store.session_time import SECONDS, seconds_parts, start_shift_us

    shifts: dict[int, int] = {}
    count = 0
    cursor = conn.execute(_TRIALS_SQL)
    with atomic_file(path) as out:
        writer = csv.writer(out)
        writer.writerow(TRIAL_CSV_COLUMNS)
        while rows := cursor.fetchmany(block_rows):
            for session in {row[1] for row in rows} - shifts.keys():
                shifts[session] = start_shift_us(conn, session)
            texts: dict[str, Any] = {}  # one block's distinct texts, each checked once
            seconds = [SECONDS % parts for parts in zip(*seconds_parts(
                np.array([shifts[row[1]] + row[7] for row in rows], dtype=np.int64)))]
            writer.writerows([(texts[v] if v in texts else texts.setdefault(v, safe_cell(v))) if type(v) is str
                              else "" if v is None else v for v in (*row[:8], text, *row[8:])]
                             for row, text in zip(rows, seconds))
            count += len(rows)
            if tick is not None:
                tick(count)
    return count


def _cell(value: str | None) -> str:
    """A text cell as csv.writer writes it (quoted when it holds a comma, quote or line break), made safe."""
    safe = safe_cell(value)
    if not safe:
        return ""
    buffer = io.StringIO()
    csv.writer(buffer).writerow([safe])
    return buffer.getvalue()[:-2]
