"""What the check-in dialog needs from the store about animals.

Rule: read-only queries over the sessions table; an animal's current stage is
the stage recorded on its latest session (by start time) that has one.
Sessions of no animal (a box streaming with nobody checked in) are skipped.
"""

from __future__ import annotations

import sqlite3


def latest_stages(conn: sqlite3.Connection) -> dict[str, str]:
    """animal -> the stage of its latest session with a stage (empty when the store has no stage column)."""
    columns = {row[1] for row in conn.execute("PRAGMA table_info(sessions)")}
    if "stage" not in columns:
        return {}
    rows = conn.execute("SELECT animal, stage FROM sessions WHERE animal != '' AND stage IS NOT NULL "
                        "ORDER BY started_at, id").fetchall()
    return {animal: stage for animal, stage in rows}
