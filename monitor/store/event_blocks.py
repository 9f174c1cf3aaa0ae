"""Stored events a block at a time, column by column, for the exports.

Rule: events come in stored order (rowid), at most `size` rows a block, each
column a tuple as SQLite gives it (`array(name)`: a numeric column as a numpy
int64 array; value None: no arguments), so an export of any number of
events holds one block at a time and works on whole columns. One session's events are read by its rowid range
when it is known (as monitor.store.derive.session_events reads them), else by
its session id. Event words come from `event_words` (code -> word).
"""

from __future__ import annotations

import sqlite3
from dataclasses import dataclass
from typing import TYPE_CHECKING, Iterator, Sequence

if TYPE_CHECKING:
    import numpy as np

BLOCK_ROWS = 16_384  # a few MB of Python objects at a time, whatever the number of events

@dataclass(frozen=True)
class EventBlock:
    """Consecutive stored events: equal-length columns."""

    session: Sequence[int]
    segment: Sequence[int]
    line: Sequence[int]
    t_us: Sequence[int]
    raw_time: Sequence[int]
    code: Sequence[int]
    value: Sequence[str | None]

    def __len__(self) -> int:
        return len(self.value)

    def array(self, name: str) -> np.ndarray:
        """A numeric column as a numpy int64 array."""
        import numpy as np

        return np.array(getattr(self, name), dtype=np.int64)


def event_words(conn: sqlite3.Connection) -> dict[int, str]:
    """Each event code's word."""
    return dict(conn.execute("SELECT code, name FROM event_codes"))


def event_blocks(conn: sqlite3.Connection, session_id: int | None = None,
                 size: int = BLOCK_ROWS) -> Iterator[EventBlock]:
    """Every stored event (or `session_id`'s), in stored order, `size` rows at a time."""
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
    while rows := cursor.fetchmany(size):
        yield EventBlock(*zip(*rows))


def session_block(conn: sqlite3.Connection, session_id: int) -> EventBlock:
    """All of one session's events as one block."""
    blocks = list(event_blocks(conn, session_id))
    if len(blocks) == 1:
        return blocks[0]
    return EventBlock(*([v for b in blocks for v in getattr(b, name)] for name in
                        ("session", "segment", "line", "t_us", "raw_time", "code", "value")))
