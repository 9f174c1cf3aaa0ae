"""Changes to a recorded session that a person makes afterwards, each logged.

Rule: a box that streamed with nobody checked in leaves its events in a
session of no animal (an "unattended run"); a person may give such a run to
an animal afterwards (it takes the protocol and stage given, its trials are
derived again) — once, and only a run that has ended. Exclusions and their
undoing go through here too. Every change needs an operator and a reason and
is appended to `session_changes` (append-only: the store refuses updates and
deletes) in the same transaction as the change itself.
"""

from __future__ import annotations

import sqlite3
from datetime import datetime
from typing import NamedTuple

from monitor.core.alerts import ACTIVITY_EVENTS
from monitor.store import derive, registry
from monitor.store.registry import RecordError

ACTIVITY = ACTIVITY_EVENTS   # what makes a run worth giving: presses, pushes or trials


class UnattendedRun(NamedTuple):
    """A run of a box with nobody checked in."""

    session_id: int
    rig: str
    start: str           # local start time, ISO 8601
    ended: bool
    presses: int         # presses, pushes and trial starts


def _now() -> str:
    return datetime.now().astimezone().isoformat(timespec="seconds")


def _log(conn: sqlite3.Connection, session_id: int, change: str, animal: str | None, reason: str,
         operator: str) -> None:
    conn.execute("INSERT INTO session_changes (session_id, change, animal, reason, operator, at) "
                 "VALUES (?, ?, ?, ?, ?, ?)", (session_id, change, animal, reason.strip(), operator.strip(), _now()))


def _needs(reason: str, operator: str) -> None:
    if not operator or not operator.strip():
        raise RecordError("operator: who makes the change is needed")
    if not reason or not reason.strip():
        raise RecordError("reason: say why")


def unattended_runs(conn: sqlite3.Connection, rig: str | None = None) -> list[UnattendedRun]:
    """Runs of no animal with at least one press, push or trial start, oldest first (of one box when given)."""
    codes = [r[0] for r in conn.execute(f"SELECT code FROM event_codes WHERE name IN "
                                        f"({', '.join('?' * len(ACTIVITY))})", ACTIVITY)]
    where, args = "animal = ''", []
    if rig is not None:
        where, args = where + " AND rig = ?", [rig]
    runs = conn.execute(f"SELECT id, rig, start_wall, ended_at IS NOT NULL FROM sessions WHERE {where} "
                        "ORDER BY started_at, id", args).fetchall()
    if not runs or not codes:
        return []
    ids = [r[0] for r in runs]
    counts = dict(conn.execute(
        f"SELECT session_id, count(*) FROM events WHERE session_id IN ({', '.join('?' * len(ids))}) "
        f"AND code IN ({', '.join('?' * len(codes))}) GROUP BY session_id", [*ids, *codes]).fetchall())
    return [UnattendedRun(i, r, start, bool(ended), counts[i]) for i, r, start, ended in runs if counts.get(i)]


def latest_protocol_id(conn: sqlite3.Connection, animal: str) -> int | None:
    """The protocol of the animal's latest session that has one (None: no such session)."""
    row = conn.execute("SELECT protocol_id FROM sessions WHERE animal = ? AND protocol_id IS NOT NULL "
                       "ORDER BY started_at DESC, id DESC LIMIT 1", (animal,)).fetchone()
    return None if row is None else int(row[0])


def give_run(conn: sqlite3.Connection, session_id: int, *, animal: str, operator: str, reason: str,
             protocol_id: int, stage: str | None = None) -> int:
    """Give an ended unattended run to `animal` (logged); return the trials derived from it."""
    _needs(reason, operator)
    if not animal or not animal.strip():
        raise RecordError("animal: name the animal the trials belong to")
    row = conn.execute("SELECT animal, ended_at FROM sessions WHERE id = ?", (session_id,)).fetchone()
    if row is None:
        raise RecordError("run: no such run")
    if row[0]:
        raise RecordError(f"run: it already belongs to {row[0]}")
    if row[1] is None:
        raise RecordError("run: it is still running; end it first")
    name, version, text = conn.execute("SELECT name, version, text FROM protocols WHERE id = ?",
                                       (protocol_id,)).fetchone()
    animal_id = registry.ensure_animal(conn, animal.strip())
    conn.execute("UPDATE sessions SET animal = ?, animal_id = ?, protocol_id = ?, protocol_name = ?, "
                 "protocol_version = ?, protocol_text = ?, stage = ? WHERE id = ?",
                 (animal.strip(), animal_id, protocol_id, name, version, text, stage, session_id))
    _log(conn, session_id, "given", animal.strip(), reason, operator)
    return derive.rebuild_trials(conn, session_id)


def set_excluded(conn: sqlite3.Connection, session_id: int, excluded: bool, *, reason: str, operator: str) -> None:
    """Exclude a session, or undo its exclusion, with a reason (logged)."""
    _needs(reason, operator)
    registry.exclude_session(conn, session_id, reason.strip(), operator.strip(), excluded=excluded)
    animal = conn.execute("SELECT animal FROM sessions WHERE id = ?", (session_id,)).fetchone()[0]
    _log(conn, session_id, "excluded" if excluded else "included", animal, reason, operator)


def checked_out_by(conn: sqlite3.Connection, session_id: int, operator: str) -> None:
    """Record who checked the animal of a checked-in session out."""
    if not operator or not operator.strip():
        raise RecordError("operator: who checks the animal out is needed")
    conn.execute("UPDATE checkins SET checked_out_by = ? WHERE session_id = ?", (operator.strip(), session_id))


def changes_of(conn: sqlite3.Connection, session_id: int) -> list[tuple[str, str | None, str, str, str]]:
    """(change, animal, reason, operator, at) of one session, oldest first."""
    return conn.execute("SELECT change, animal, reason, operator, at FROM session_changes WHERE session_id = ? "
                        "ORDER BY id", (session_id,)).fetchall()
