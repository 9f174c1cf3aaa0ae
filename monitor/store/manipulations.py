"""The manipulation log and the unblindings in the store: insert-only rows.

Rule: a manipulation entry is appended in the caller's `BEGIN IMMEDIATE`
transaction: the last entry (by insertion order) and, for a withdrawal, the
withdrawn one are read inside it, chained with
monitor.core.manipulation_log's `append`, and inserted with every content
field as a column, the canonical payload and the hash. Verification rebuilds
each entry from its columns, so an edited column shows. An unblinding is one
row per cohort (who, why, when); nothing updates or deletes either table
(triggers refuse it).
"""

from __future__ import annotations

import sqlite3

from monitor.core.manipulation_log import Manipulation, ManipulationEntry, append, first_broken

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
