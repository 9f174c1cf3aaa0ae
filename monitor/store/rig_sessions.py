"""The window's rig sessions in the store: a rig's source and idle run, check-in, check-out, an unattended run given.

Rule: each function runs in the caller's transaction (the store writer's
`call`). Before anyone checks in, a rig's events go to a run of no animal
(`NO_ANIMAL`); check-in ends the session before it and opens a checked-in
session under the protocol's stored text (monitor.store.registry); check-out
ends the check-in record (with who, when named) and derives the session's
trials (monitor.store.derive), and a session opened without a check-in
record is simply ended; giving an unattended run ends it and hands it to an
animal, logged (monitor.store.session_changes).
"""

from __future__ import annotations

import sqlite3
from typing import Any, Callable, NamedTuple

from drivers.status import FilePosition
from monitor.store import db, derive, registry, session_changes
from monitor.store.importer import imported_start

NO_ANIMAL = ""  # the sessions row of a rig's events before anyone checked in


class ProtocolText(NamedTuple):
    """A protocol as stored with a session: its name, version and whole text."""

    name: str
    version: int
    text: str


class RegisteredRig(NamedTuple):
    """A rig's rows: its source, its run of no animal, and where a file source resumes (None: serial, or new)
    with what to say about it (a file whose beginning was imported goes on after the imported bytes)."""

    source_id: int
    idle_session_id: int
    resume: FilePosition | None
    resume_notice: str | None = None


def register_rig(conn: sqlite3.Connection, *, name: str, kind: str, key: str, usb_serial: str | None,
                 mapping: str | None, valve_ul_per_ms: float | None,
                 decoder_factory: Callable[[], Any] | None = None) -> RegisteredRig:
    """The source row, the rig's binding and valve calibration, a fresh idle run and the file's resume point
    (for a file never read live whose beginning was imported, after the imported bytes, decoded with
    `decoder_factory`: `importer.imported_start`)."""
    source_id = db.register_source(conn, kind, key, name, usb_serial, mapping)
    registry.ensure_rig(conn, name, usb_serial=usb_serial, port=key, valve_ul_per_ms=valve_ul_per_ms)
    idle = start_idle_run(conn, source_id, name)
    resume = db.file_position(conn, source_id) if kind == "file" else None
    if kind == "file" and resume is None and decoder_factory is not None:
        imported = imported_start(conn, key, decoder_factory)
        if imported is not None:
            return RegisteredRig(source_id, idle, imported.position, imported.notice(key))
    return RegisteredRig(source_id, idle, resume)


def start_idle_run(conn: sqlite3.Connection, source_id: int, rig: str) -> int:
    """A run of no animal that takes the rig's events until someone checks in."""
    return db.start_session(conn, source_id, NO_ANIMAL, rig, None, None, None)


def check_in(conn: sqlite3.Connection, *, previous: int | None, animal: str, rig: str, operator: str,
             protocol: ProtocolText, weight_g: float | None, stage: str | None,
             source_id: int) -> tuple[int, str | None]:
    """End the rig's checked-in session (if any) and open one for `animal`: (session id, warning or None)."""
    if previous is not None:
        check_out(conn, previous)
    protocol_id = registry.ensure_protocol(conn, *protocol)
    return registry.check_in(conn, animal=animal, rig=rig, operator=operator, protocol_id=protocol_id,
                            weight_before_g=weight_g, stage=stage, source_id=source_id)


def check_out(conn: sqlite3.Connection, session_id: int, operator: str = "") -> None:
    """End a checked-in session (who, when named) and derive its trials; a session without a check-in just ends."""
    try:
        registry.check_out(conn, session_id)
        if operator.strip():
            session_changes.checked_out_by(conn, session_id, operator)
    except registry.RecordError:           # a session opened without a check-in record
        db.end_session(conn, session_id)
    derive.rebuild_trials(conn, session_id)


def close_all(conn: sqlite3.Connection, checked_in: list[int], idle: list[int]) -> None:
    """The window closes: check out every checked-in session, end every idle run."""
    for session_id in checked_in:
        check_out(conn, session_id)
    for session_id in idle:
        db.end_session(conn, session_id)


def give_run(conn: sqlite3.Connection, session_id: int, *, animal: str, operator: str, reason: str,
             protocol: ProtocolText, stage: str | None) -> int:
    """End an unattended run and give it to `animal` (logged); the number of trials it held."""
    db.end_session(conn, session_id)
    protocol_id = registry.ensure_protocol(conn, *protocol)
    return session_changes.give_run(conn, session_id, animal=animal, operator=operator, reason=reason,
                                    protocol_id=protocol_id, stage=stage)
