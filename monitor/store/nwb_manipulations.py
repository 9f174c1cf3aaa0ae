"""NWB: the manipulations in force during a session, as a session-level table (hdmf's DynamicTable).

Rule: a session's file gets a `manipulations` table when a manipulation in
force (not withdrawn) affects it: an acute one its test session (or, for a
control, its vehicle or sham session), a lasting one every session from the
first affected on, and an acute test's control session carries the test as
well (role `control session of`). The table describes the whole session, not
a span inside it, so it has no time columns (an intervals table whose every
row spans the session has nothing but one start time, which NWB's checker
rightly refuses): it is a plain DynamicTable in the `behavior` processing
module (`/processing/behavior/manipulations`). One row per manipulation, with
its seq, duration (acute | lasting), role, what, group as stored (a code in a
blinded cohort: the file never unblinds) and the stage frozen when it was
recorded.
"""

from __future__ import annotations

import sqlite3
from typing import Any

import numpy as np

from monitor.store.nwb_file import Column, Table

COLUMNS = (("seq", "the manipulation log's entry number"),
           ("duration", "acute (one test session) | lasting (every session from the first affected on)"),
           ("role", "test | control (vehicle, sham) | control session of (an acute test's control day)"),
           ("what", "what was done"),
           ("group", "the animal's group as recorded (a code in a blinded cohort)"),
           ("first_session", "rigside's id of the first affected session"),
           ("stage_session", "the last session before the manipulation (the stage's figures are at its end)"),
           ("slow_estimate", "model-based slow-state fraction at stage_session (NaN: not known)"),
           ("slow_low", "its interval's low end (NaN: not known)"),
           ("slow_high", "its interval's high end (NaN: not known)"),
           ("slow_status", "the fraction's status word"),
           ("sessions_since_plateau", "included sessions after the plateau session (-1: plateau not reached)"),
           ("trials_since_plateau", "their completed trials (-1: plateau not reached)"))


def rows_for_session(conn: sqlite3.Connection, session_id: int) -> list[dict[str, Any]]:
    """The manipulations in force during `session_id`, as table rows without times."""
    from monitor.core.effects.manipulation_log import in_force
    from monitor.store.manipulations import entries

    row = conn.execute("SELECT animal, started_at FROM sessions WHERE id = ?", (session_id,)).fetchone()
    if row is None:
        return []
    animal, started = row
    out = []
    for e in in_force(entries(conn, animal)):
        m = e.manipulation
        first = conn.execute("SELECT started_at FROM sessions WHERE id = ?", (m.session_id,)).fetchone()
        affects = m.session_id == session_id or (m.duration == "lasting" and first is not None
                                                 and started >= first[0])
        if not affects and m.control_session_id != session_id:
            continue
        role = m.role if affects else "control session of"
        stage = m.stage_data()
        number = lambda key: float("nan") if stage.get(key) is None else float(stage[key])  # noqa: E731
        count = lambda key: -1 if stage.get(key) is None else int(stage[key])  # noqa: E731
        out.append({"seq": e.seq, "duration": m.duration, "role": role, "what": m.what,
                    "group": m.group or m.group_code or "", "first_session": m.session_id,
                    "stage_session": count("session"), "slow_estimate": number("slow_estimate"),
                    "slow_low": number("slow_low"), "slow_high": number("slow_high"),
                    "slow_status": stage.get("slow_status") or "",
                    "sessions_since_plateau": count("sessions_since_plateau"),
                    "trials_since_plateau": count("trials_since_plateau")})
    return out


def manipulations_table(conn: sqlite3.Connection, session_id: int) -> Table | None:
    """The `manipulations` table of `session_id` (one row per manipulation in force, no times); None when no
    manipulation affects the session."""
    rows = rows_for_session(conn, session_id)
    if not rows:
        return None
    columns = []
    for name, description in COLUMNS:
        values = [r[name] for r in rows]
        kind = np.float64 if isinstance(values[0], float) else np.int64 if isinstance(values[0], int) else None
        columns.append(Column(name, description, values if kind is None else np.array(values, dtype=kind)))
    return Table("manipulations", "DynamicTable", "manipulations in force during this whole session (rigside's "
                 "manipulation log), one row each; session-level annotations, so no start or stop times; the "
                 "stage columns are frozen at the time each was recorded", columns, len(rows), compressed=False)
