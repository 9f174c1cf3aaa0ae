"""Decoded records as stored rows: the one place where a record becomes a row.

Rule: `session_rows` turns one session's decoder records, in order, into event
rows (segment, line, t_us, raw_time, code, value, wall) and raw-line rows
(line, byte offset, kind, reason, raw bytes): an `Event` is an event row (its
word as a code, its arguments joined by one space, NULL when none); a
`Malformed` line, a `Header` (its text rebuilt) and a `Comment` are raw lines
with their position; anything else is refused (TypeError). The rows carry no
session id: `insert_rows` (and `event_sql` / `raw_sql`) put it in the
statement, so rows can be made before the session exists (an import's worker
processes) and no row is touched again to add it. Words the store has no code
for get provisional codes from `Codes`; `Codes.settle`, inside the writing
transaction, stores them (another process may have added words meanwhile) and
says which provisional codes became which, for `recode`. The live writer and
the importer both store rows made here.
"""

from __future__ import annotations

import sqlite3
from collections.abc import Iterable
from itertools import chain

from drivers.wire import Comment, Event, Header, Malformed, Record
from monitor.store.schema import FIRST_UNKNOWN_CODE

EVENT_COLUMNS = ("segment", "line", "t_us", "raw_time", "code", "value", "wall")
RAW_COLUMNS = ("line", "byte_offset", "kind", "reason", "raw")
CODE = EVENT_COLUMNS.index("code")
ROWS_PER_STATEMENT = 50  # event rows in one INSERT: 350 parameters, within the 999 of SQLite before 3.32


class Codes:
    """Event word -> code: the store's codes, and provisional ones for words it does not know yet."""

    def __init__(self, known: dict[str, int]) -> None:
        self.known = dict(known)
        self.new: list[tuple[int, str]] = []  # (provisional code, word), not stored yet
        self._next = max([FIRST_UNKNOWN_CODE - 1, *self.known.values()]) + 1

    def add(self, name: str) -> int:
        """A provisional code for a word without one."""
        code = self._next
        self._next += 1
        self.known[name] = code
        self.new.append((code, name))
        return code

    def settle(self, conn: sqlite3.Connection) -> dict[int, int]:
        """Store the provisional words (in the caller's transaction); {provisional code: final} where they differ.

        A word the store got meanwhile (another process) keeps the store's code; a new word gets the next free
        one. Until the transaction commits, the words stay in `new` under their final codes (a retry stores them)."""
        if not self.new:
            return {}
        stored = dict(conn.execute("SELECT name, code FROM event_codes"))
        top = max([FIRST_UNKNOWN_CODE - 1, *stored.values()])
        remap: dict[int, int] = {}
        fresh: list[tuple[int, str]] = []
        for code, name in self.new:
            final = stored.get(name)
            if final is None:
                top += 1
                final = top
                fresh.append((final, name))
            if final != code:
                remap[code] = final
            self.known[name] = final
        self._next = max(self._next, top + 1)
        self.new = fresh
        conn.executemany("INSERT INTO event_codes (code, name, known) VALUES (?, ?, 0)", fresh)
        return remap


def session_rows(records: Iterable[Record], codes: Codes) -> tuple[list[tuple], list[tuple]]:
    """(event rows, raw-line rows) of one session's records, in order (the module rule)."""
    events: list[tuple] = []
    raw: list[tuple] = []
    add_event, add_raw = events.append, raw.append
    known = codes.known
    for r in records:
        kind = type(r)
        if kind is Event:
            t_us, name, args, raw_time, segment, line, _, _, wall, _, _ = r
            code = known.get(name)
            if code is None:
                code = codes.add(name)
            add_event((segment, line, t_us, raw_time, code, " ".join(args) if args else None, wall))
        elif kind is Malformed:
            add_raw((r.line, r.offset, "malformed", r.reason, bytes(r.raw)))
        elif kind is Header:
            text = " ".join([f"# rigside-wire {r.version}", *(f"{k}={v}" for k, v in r.fields.items())])
            add_raw((r.line, r.offset, "header", None, text.encode("ascii", "replace")))
        elif kind is Comment:
            add_raw((r.line, r.offset, "comment", None, r.text.encode("utf-8", "surrogateescape")))
        else:
            raise TypeError(f"not a decoder record: {r!r:.80}")
    return events, raw


def event_sql(session_id: int) -> str:
    """The INSERT of one session's event rows (the id is an integer: safe in the statement)."""
    return (f"INSERT INTO events (session_id, {', '.join(EVENT_COLUMNS)}) "
            f"VALUES ({int(session_id)}, {', '.join('?' * len(EVENT_COLUMNS))})")


def raw_sql(session_id: int) -> str:
    """The INSERT of one session's raw-line rows."""
    return (f"INSERT INTO raw_lines (session_id, {', '.join(RAW_COLUMNS)}) "
            f"VALUES ({int(session_id)}, {', '.join('?' * len(RAW_COLUMNS))})")


def insert_rows(conn: sqlite3.Connection, session_id: int, events: list[tuple], raw: list[tuple]) -> None:
    """Store one session's rows in the caller's transaction, in order (the events' rowids follow it): the
    events `ROWS_PER_STATEMENT` to an INSERT, which costs SQLite a third less than one row at a time."""
    if events:
        single = event_sql(session_id)
        head, marks = single.split(" VALUES ")
        width = len(EVENT_COLUMNS) * ROWS_PER_STATEMENT
        full = len(events) - len(events) % ROWS_PER_STATEMENT
        if full:
            flat = list(chain.from_iterable(events[:full]))
            conn.executemany(f"{head} VALUES {', '.join([marks] * ROWS_PER_STATEMENT)}",
                             [flat[i:i + width] for i in range(0, len(flat), width)])
        if full < len(events):
            conn.executemany(single, events[full:])
    if raw:
        conn.executemany(raw_sql(session_id), raw)


def recode(events: list[tuple], remap: dict[int, int]) -> list[tuple]:
    """Event rows with provisional codes replaced by their final ones."""
    if not remap:
        return events
    return [row if row[CODE] not in remap else (*row[:CODE], remap[row[CODE]], *row[CODE + 1:]) for row in events]
