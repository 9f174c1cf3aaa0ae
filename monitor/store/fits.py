"""The cache of consolidation fits: one row per fit, the newest per animal is read.

Rule: a fit is stored with the fingerprint of the data it was fitted to
(`data_fingerprint`: the animal's included sessions, in time order, with the
time their trials were last derived; a session still being recorded is left
out), its parameters, the report's
consolidation block (`consolidation_block`) and its per-session estimates, all JSON.
Reading never refits: `latest_fit` is the newest fit of the data as they are
now, else the newest fit (two fits can be saved out of order: a slower refit
of older data finishing after a newer one must not hide the current fit);
`cached_block` gives its block with `"current"` (its fingerprint equals the
data's now) added; an animal with no
fit yet gets NOT_FITTED for its last session, estimate 0 with the interval
[0, 1], which no eligibility window accepts.
"""

from __future__ import annotations

import hashlib
import json
import sqlite3
import time
from typing import Any, Mapping, Sequence

from monitor.store.registry import ensure_animal

NOT_FITTED = "not fitted"
FINISHED = "(s.ended_at IS NOT NULL OR s.import_id IS NOT NULL)"  # SQL: a session that is not being recorded now


def data_fingerprint(conn: sqlite3.Connection, animal: str) -> str:
    """SHA-256 over the animal's included sessions and their trial builds (a session still being
    recorded does not count: a fit describes the end of a session)."""
    rows = conn.execute(
        "SELECT s.id, coalesce(b.built_at, 0), coalesce(b.trials, 0) FROM sessions AS s "
        f"LEFT JOIN trial_builds AS b ON b.session_id = s.id WHERE s.animal = ? AND s.excluded = 0 AND {FINISHED} "
        "ORDER BY s.started_at, s.id", (animal,)).fetchall()
    return hashlib.sha256(json.dumps(rows).encode()).hexdigest()


def save_fit(conn: sqlite3.Connection, animal: str, *, fingerprint: str, params: Mapping[str, Any],
             block: Mapping[str, Any], sessions: Sequence[Mapping[str, Any]]) -> int:
    """Store a fit (in the caller's transaction); return its id."""
    for key in ("session", "estimate", "low", "high", "status"):
        if key not in block:
            raise ValueError(f"block: the consolidation block needs {key!r}")
    cur = conn.execute("INSERT INTO fits (animal_id, created_at, fingerprint, params, block, sessions) "
                       "VALUES (?, ?, ?, ?, ?, ?)",
                       (ensure_animal(conn, animal), time.time(), fingerprint, json.dumps(dict(params)),
                        json.dumps(dict(block)), json.dumps([dict(s) for s in sessions])))
    return int(cur.lastrowid)


def latest_fit(conn: sqlite3.Connection, animal: str) -> dict[str, Any] | None:
    """The fit to read for `animal` (the module rule): fingerprint, params, block, sessions, created_at and
    current (fitted to the data as they are now); or None."""
    now = data_fingerprint(conn, animal)
    select = ("SELECT f.fingerprint, f.params, f.block, f.sessions, f.created_at FROM fits AS f "
              "JOIN animals AS a ON a.id = f.animal_id WHERE a.name = ?")
    row = (conn.execute(f"{select} AND f.fingerprint = ? ORDER BY f.id DESC LIMIT 1", (animal, now)).fetchone()
           or conn.execute(f"{select} ORDER BY f.id DESC LIMIT 1", (animal,)).fetchone())
    if row is None:
        return None
    return {"fingerprint": row[0], "params": json.loads(row[1]), "block": json.loads(row[2]),
            "sessions": json.loads(row[3]), "created_at": row[4], "current": row[0] == now}


def cached_block(conn: sqlite3.Connection, animal: str, last_session: int | None) -> dict[str, Any]:
    """The consolidation block for the report (never a refit)."""
    return block_of(latest_fit(conn, animal), last_session)


def block_of(fit: dict[str, Any] | None, last_session: int | None) -> dict[str, Any]:
    """The report's consolidation block of a `latest_fit` answer (NOT_FITTED at `last_session` for None)."""
    if fit is None:
        return {"session": last_session, "estimate": 0.0, "low": 0.0, "high": 1.0, "status": NOT_FITTED,
                "current": False}
    block = dict(fit["block"])
    block["current"] = fit["current"]
    return block


def has_current_fit(conn: sqlite3.Connection, animal: str) -> bool:
    """Whether one of the animal's fits was fitted to its data as they are now."""
    fit = latest_fit(conn, animal)
    return fit is not None and fit["current"]
