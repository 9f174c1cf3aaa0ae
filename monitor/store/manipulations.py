"""The manipulation log and the unblindings in the store: insert-only rows.

Rule: a manipulation entry is appended in the caller's `BEGIN IMMEDIATE`
transaction: the last entry (by insertion order) and, for a withdrawal, the
withdrawn one are read inside it, chained with
monitor.core.effects.manipulation_log's `append`, and inserted with every content
field as a column, the canonical payload and the hash. Verification rebuilds
each entry from its columns, so an edited column shows. An unblinding is one
row per cohort (who, why, when); nothing updates or deletes either table
(triggers refuse it). The reads the effects need (an animal's report
sessions, its cohort, its latest assignment, the protocol in force) are here
too, so SQL stays in the store.
"""

from __future__ import annotations

import sqlite3

from monitor.core.effects.manipulation_log import Manipulation, ManipulationEntry, append, first_broken

_COLUMNS = {"seq": "seq", "prev_hash": "prev_hash", "animal": "animal", "cohort": "cohort",
            "duration": "duration", "role": "role", "what": "what", "session_id": "session_id",
            "control_session_id": "control_session_id", "group": "group_name", "group_code": "group_code",
            "operator": "operator", "reason": "reason", "time": "time", "stage": "stage",
            "withdraws": "withdraws"}
_SELECT = f"SELECT {', '.join(_COLUMNS.values())}, hash FROM manipulations"


def _entry(row: tuple) -> ManipulationEntry:
    return ManipulationEntry.from_content(dict(zip(_COLUMNS, row[:len(_COLUMNS)])), row[len(_COLUMNS)])


def entries(conn: sqlite3.Connection, animal: str | None = None) -> list[ManipulationEntry]:
    """Entries in insertion order (optionally one animal's)."""
    sql, args = (_SELECT + " ORDER BY id", ()) if animal is None else \
        (_SELECT + " WHERE animal = ? ORDER BY id", (animal,))
    return [_entry(r) for r in conn.execute(sql, args)]


def append_manipulation(conn: sqlite3.Connection, manipulation: Manipulation) -> ManipulationEntry:
    """Chain `manipulation` after the last entry and insert it (caller holds BEGIN IMMEDIATE)."""
    last = conn.execute(_SELECT + " ORDER BY id DESC LIMIT 1").fetchone()
    withdrawn = None
    if manipulation.withdraws is not None:
        row = conn.execute(_SELECT + " WHERE seq = ?", (manipulation.withdraws,)).fetchone()
        withdrawn = None if row is None else _entry(row)
    entry = append(None if last is None else _entry(last), manipulation, withdrawn)
    content = entry.content()
    values = [manipulation.stage if name == "stage" else content[name] for name in _COLUMNS]
    conn.execute(f"INSERT INTO manipulations ({', '.join(_COLUMNS.values())}, payload, hash) "
                 f"VALUES ({', '.join('?' * (len(_COLUMNS) + 2))})", (*values, entry.payload(), entry.hash))
    return entry


def verify(conn: sqlite3.Connection) -> str | None:
    """None when the stored chain holds; else a sentence naming the first broken entry."""
    return first_broken(entries(conn))


def unblind(conn: sqlite3.Connection, cohort: str, operator: str, reason: str, time: str) -> None:
    """Record that the cohort's group labels may be shown (caller's transaction); ValueError when already so."""
    if conn.execute("SELECT 1 FROM unblindings WHERE cohort = ?", (cohort,)).fetchone():
        raise ValueError(f"cohort {cohort!r} is already unblinded")
    conn.execute("INSERT INTO unblindings (cohort, operator, reason, time) VALUES (?, ?, ?, ?)",
                 (cohort, operator, reason, time))


def unblinded(conn: sqlite3.Connection) -> dict[str, dict[str, str]]:
    """Unblinded cohorts: name -> who, why, when."""
    return {r[0]: {"operator": r[1], "reason": r[2], "time": r[3]}
            for r in conn.execute("SELECT cohort, operator, reason, time FROM unblindings")}


def latest_protocol_text(conn: sqlite3.Connection, animal: str) -> str | None:
    """The protocol text of the animal's latest session that has one."""
    row = conn.execute("SELECT protocol_text FROM sessions WHERE animal = ? AND protocol_text IS NOT NULL "
                       "ORDER BY started_at DESC, id DESC LIMIT 1", (animal,)).fetchone()
    return None if row is None else row[0]


def animal_cohort(conn: sqlite3.Connection, animal: str) -> str | None:
    """The cohort named in the animal's record (None when none)."""
    row = conn.execute("SELECT cohort FROM animals WHERE name = ?", (animal,)).fetchone()
    return None if row is None else row[0]


def assigned_group(conn: sqlite3.Connection, animal: str) -> tuple[str | None, str | None]:
    """(group, code) of the animal's latest `assigned` decision; (None, None) when it has none."""
    row = conn.execute("SELECT group_name, group_code FROM decisions WHERE animal = ? AND decision = 'assigned' "
                       "ORDER BY id DESC LIMIT 1", (animal,)).fetchone()
    return (row[0], row[1]) if row else (None, None)


def report_sessions(conn: sqlite3.Connection, animal: str) -> list[tuple]:
    """The sessions the report indexes (with a protocol, by start then id): (id, excluded, started_at,
    ended_at, start_wall, stage, derived), `derived` = its trials are stored."""
    return conn.execute(
        "SELECT s.id, s.excluded, s.started_at, s.ended_at, s.start_wall, s.stage, b.session_id IS NOT NULL "
        "FROM sessions AS s LEFT JOIN trial_builds AS b ON b.session_id = s.id "
        "WHERE s.animal = ? AND s.protocol_text IS NOT NULL ORDER BY s.started_at, s.id", (animal,)).fetchall()
