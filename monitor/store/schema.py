"""The store's schema: numbered forward migrations, applied in order, never edited once shipped.

Rule: `MIGRATIONS[i]` takes a database from version i to version i + 1; the
version lives in `PRAGMA user_version` and the file is marked as ours by
`PRAGMA application_id`. A change to the schema is a new `Migration` appended
to the list (SQL statements, or a Python step for data changes); a shipped
migration is never edited. Each migration runs in one transaction together
with its version bump, so a crash leaves the old version or the new one.
A file with a newer version, another application's id, or tables but no
version is refused by `monitor.store.db`, never changed.

Version 1 (the live-sources issue): sources, sessions, event_codes, events
(the lean hot table: no index, no raw text), raw_lines (only what an event row
cannot reproduce), gaps, file_offsets (a file source's resume position, written
in the same transaction as its events) and clock_samples (host receive time of
serial batches, for device-to-host alignment). Times named `*_at` are host
wall-clock seconds since the epoch (REAL); `*_wall` are ISO 8601 text.
"""

from __future__ import annotations

import sqlite3
from dataclasses import dataclass
from typing import Callable, Union

from drivers.wire import EVENT_SPECS

APPLICATION_ID = 0x52534431  # "RSD1": marks a rigside database

Step = Union[str, Callable[[sqlite3.Connection], None]]


@dataclass(frozen=True)
class Migration:
    """One step forward: `steps` run in order inside one transaction."""

    summary: str
    steps: tuple[Step, ...]


# Known event words get fixed small codes; unknown words are added by the writer from 1000 on.
KNOWN_EVENT_CODES = {name: code for code, name in enumerate(EVENT_SPECS, start=1)}
FIRST_UNKNOWN_CODE = 1000

_V1 = (
    """CREATE TABLE sources (
        id INTEGER PRIMARY KEY,
        kind TEXT NOT NULL CHECK (kind IN ('serial', 'file')),
        path TEXT NOT NULL,            -- as configured: a by-id symlink, COM name, URL or file path
        rig TEXT,
        usb_serial TEXT,
        mapping_path TEXT,
        created_at REAL NOT NULL,
        UNIQUE (kind, path)
    )""",
    """CREATE TABLE sessions (
        id INTEGER PRIMARY KEY,
        source_id INTEGER REFERENCES sources(id),
        animal TEXT NOT NULL,
        rig TEXT NOT NULL,
        protocol_name TEXT,
        protocol_version INTEGER,
        protocol_text TEXT,
        started_at REAL NOT NULL,
        ended_at REAL,                  -- NULL while recording (or after a crash)
        start_wall TEXT NOT NULL        -- ISO 8601 with UTC offset
    )""",
    """CREATE TABLE event_codes (
        code INTEGER PRIMARY KEY,
        name TEXT NOT NULL UNIQUE,
        known INTEGER NOT NULL          -- 1: an event of wire format v1
    )""",
    lambda conn: conn.executemany("INSERT INTO event_codes (code, name, known) VALUES (?, ?, 1)",
                                  [(code, name) for name, code in KNOWN_EVENT_CODES.items()]),
    """CREATE TABLE events (
        session_id INTEGER NOT NULL,
        segment INTEGER NOT NULL,       -- clock segment: a header line or reconnect starts a new one
        line INTEGER NOT NULL,          -- line number in the source's byte stream (file: in the file)
        t_us INTEGER NOT NULL,          -- unwrapped device time, microseconds, within the segment
        raw_time INTEGER NOT NULL,      -- the device counter as sent
        code INTEGER NOT NULL,          -- event_codes.code
        value TEXT,                     -- the arguments joined by one space; NULL when none
        wall TEXT                       -- mapped formats' wall time (ISO 8601); NULL for wire format
    )""",
    """CREATE TABLE raw_lines (
        session_id INTEGER NOT NULL,
        line INTEGER,
        byte_offset INTEGER,
        kind TEXT NOT NULL CHECK (kind IN ('malformed', 'unknown', 'note', 'header', 'comment', 'notice')),
        reason TEXT,                    -- malformed: why; notice: what happened
        raw BLOB                        -- the line's bytes as received (BLOB: may not be text)
    )""",
    """CREATE TABLE gaps (
        id INTEGER PRIMARY KEY,
        source_id INTEGER NOT NULL REFERENCES sources(id),
        session_id INTEGER REFERENCES sessions(id),
        start_at REAL NOT NULL,
        end_at REAL NOT NULL,
        reason TEXT NOT NULL
    )""",
    """CREATE TABLE file_offsets (
        source_id INTEGER PRIMARY KEY REFERENCES sources(id),
        byte_offset INTEGER NOT NULL,   -- first byte not yet stored as a record
        st_dev INTEGER NOT NULL,
        st_ino INTEGER NOT NULL,
        fingerprint TEXT NOT NULL,      -- sha256 of the first prefix_len bytes and the prefix_len before byte_offset
        prefix_len INTEGER NOT NULL,
        decoder TEXT NOT NULL,          -- JSON: line, offset, segment, clock/unwrap state
        updated_at REAL NOT NULL
    )""",
    """CREATE TABLE clock_samples (
        session_id INTEGER NOT NULL,
        segment INTEGER NOT NULL,
        t_us INTEGER NOT NULL,          -- device time of a batch's last event
        received_at REAL NOT NULL       -- host wall time the batch arrived
    )""",
)

MIGRATIONS: tuple[Migration, ...] = (
    Migration("live sources: sources, sessions, events, raw lines, gaps, file offsets", _V1),
)
SCHEMA_VERSION = len(MIGRATIONS)


def apply_migrations(conn: sqlite3.Connection, migrations: tuple[Migration, ...] = MIGRATIONS) -> int:
    """Bring a connection (autocommit mode) to the newest version; return it.

    The version is read again inside each write transaction, so two processes
    opening a new file at once migrate it once.
    """
    while True:
        conn.execute("BEGIN IMMEDIATE")
        try:
            version = conn.execute("PRAGMA user_version").fetchone()[0]
            if version >= len(migrations):
                conn.execute("COMMIT")
                return version
            for step in migrations[version].steps:
                if callable(step):
                    step(conn)
                else:
                    conn.execute(step)
            conn.execute(f"PRAGMA user_version = {version + 1}")
            if version == 0:
                conn.execute(f"PRAGMA application_id = {APPLICATION_ID}")
            conn.execute("COMMIT")
        except BaseException:
            conn.execute("ROLLBACK")
            raise
