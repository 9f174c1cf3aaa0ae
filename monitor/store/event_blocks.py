"""Stored events a block at a time, column by column, for the exports.

Rule: events come in stored order (rowid), at most `size` rows a block, each
numeric column a numpy int64 array (numpy is imported when events are read)
and the value column a list (None: no arguments), so an export of any
number of events holds one block at a time and works on whole columns. One session's events are read by its rowid range
when it is known (as monitor.store.derive.session_events reads them), else by
its session id. Event words come from `event_words` (code -> word).
"""

from __future__ import annotations

import sqlite3
from dataclasses import dataclass
from typing import TYPE_CHECKING, Iterator

if TYPE_CHECKING:
    import numpy as np

BLOCK_ROWS = 16_384  # a few MB of Python objects at a time, whatever the number of events

@dataclass(frozen=True)
class EventBlock:
    """Consecutive stored events: equal-length columns."""

    session: np.ndarray
    segment: np.ndarray
    line: np.ndarray
    t_us: np.ndarray
    raw_time: np.ndarray
    code: np.ndarray
    value: list[str | None]

    def __len__(self) -> int:
        return len(self.value)


def event_words(conn: sqlite3.Connection) -> dict[int, str]:
    """Each event code's word."""
    return dict(conn.execute("SELECT code, name FROM event_codes"))


def event_blocks(conn: sqlite3.Connection, session_id: int | None = None,
                 size: int = BLOCK_ROWS) -> Iterator[EventBlock]:
    """Every stored event (or `session_id`'s), in stored order, `size` rows at a time."""
    import numpy as np

    sql = "SELECT session_id, segment, line, t_us, raw_time, code, value FROM events"
    args: list[int] = []
    if session_id is not None:
        first, last = conn.execute("SELECT first_event, last_event FROM sessions WHERE id = ?",
                                   (session_id,)).fetchone()
        sql += " WHERE session_id = ?"
        args = [session_id]
        if first is not None and last is not None:
            sql += " AND rowid BETWEEN ? AND ?"
            args += [first, last]
    cursor = conn.execute(sql + " ORDER BY rowid", args)
    while True:
        rows = cursor.fetchmany(size)
        if not rows:
            return
        session, segment, line, t_us, raw_time, code, value = zip(*rows)
        yield EventBlock(*(np.array(c, dtype=np.int64) for c in (session, segment, line, t_us, raw_time, code)),
                         value=list(value))


def session_block(conn: sqlite3.Connection, session_id: int) -> EventBlock:
    """All of one session's events as one block."""
    import numpy as np

    blocks = list(event_blocks(conn, session_id))
    if len(blocks) == 1:
        return blocks[0]
    empty = np.zeros(0, dtype=np.int64)
    return EventBlock(*(np.concatenate([getattr(b, name) for b in blocks]) if blocks else empty
                        for name in ("session", "segment", "line", "t_us", "raw_time", "code")),
                      value=[v for b in blocks for v in b.value])
