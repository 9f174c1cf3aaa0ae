"""The per-animal report from the store: stored trials in, plain JSON out.

Rule: per animal, its sessions in time order (start, then id) are handed to
`monitor.core.session.animal_report.animal_report` as their stored trials (no event is
re-read, no model refitted), under the protocol of the animal's latest
session; excluded sessions are listed, flagged, and left out of the curve by
the core (a session recorded live whose trials were not derived yet is
derived in memory). What the trials alone cannot give — inter-trial presses,
disagreements with the rig, water — comes from the session's trial build
(the same `derive_session` run at derivation). `consolidation` is the cached
fit's block (monitor.store.fits). Extra keys per session: `session_id`,
`rig`, `label`, `conditions`. Judging every plateau rule costs about a second
per animal (the change-point and state-space rules), so each entry is cached
in `report_cache` with the fingerprint of everything it was built from
(sessions, exclusions, trial builds, conditions, protocol texts):
`refresh_cache` runs after an import, and a stale or missing entry is simply
computed again when read.
"""

from __future__ import annotations

import hashlib
import json
import sqlite3
import time
from typing import Any

from monitor.store.derive import derive, malformed_count, protocol_of, trials_by_session
from monitor.store.fits import cached_block
from monitor.store.registry import animal_names, conditions_of, ensure_animal


def load_libraries() -> None:
    """Import what building an entry needs (numpy; scipy.special for the plateau rules, about 0.4 s), so that an
    import loads them while its workers start rather than before its first entry."""
    import scipy.special  # noqa: F401

    import monitor.core.session.animal_report  # noqa: F401


def report(conn: sqlite3.Connection, animal: str | None = None) -> dict[str, Any]:
    """`{"animals": [...]}` for one animal or every animal with sessions."""
    names = [animal] if animal is not None else animal_names(conn)
    entries = [entry for name in names if (entry := animal_entry(conn, name)) is not None]
    return {"animals": entries}


def report_fingerprint(conn: sqlite3.Connection, animal: str) -> str:
    """SHA-256 over everything an animal's report entry is built from."""
    rows = conn.execute(
        "SELECT s.id, s.start_wall, s.excluded, s.exclusion_reason, s.protocol_version, s.rig, s.label, "
        "length(s.protocol_text), b.built_at, b.trials, "
        "(SELECT group_concat(c.id) FROM conditions AS c WHERE c.session_id = s.id) "
        "FROM sessions AS s LEFT JOIN trial_builds AS b ON b.session_id = s.id "
        "WHERE s.animal = ? ORDER BY s.started_at, s.id", (animal,)).fetchall()
    last = conn.execute("SELECT protocol_text FROM sessions WHERE animal = ? AND protocol_text IS NOT NULL "
                        "ORDER BY started_at DESC, id DESC LIMIT 1", (animal,)).fetchone()
    return hashlib.sha256(json.dumps([rows, last]).encode()).hexdigest()


def animal_entry(conn: sqlite3.Connection, animal: str) -> dict[str, Any] | None:
    """One animal's report entry (cached when current), or None when it has no session with a protocol."""
    fingerprint = report_fingerprint(conn, animal)
    row = conn.execute("SELECT r.fingerprint, r.entry FROM report_cache AS r JOIN animals AS a ON a.id = r.animal_id "
                       "WHERE a.name = ?", (animal,)).fetchone()
    entry = json.loads(row[1]) if row is not None and row[0] == fingerprint else build_entry(conn, animal)
    if entry is None:
        return None
    entry["consolidation"] = cached_block(conn, animal, len(entry["sessions"]))
    return entry


def refresh_cache(conn: sqlite3.Connection, animal: str) -> None:
    """Build and keep the animal's report entry (in the caller's transaction)."""
    keep_entry(conn, animal, report_fingerprint(conn, animal), build_entry(conn, animal))


def entry_with_fingerprint(conn: sqlite3.Connection, animal: str) -> tuple[str, dict[str, Any] | None]:
    """The animal's entry and the fingerprint of what it was built from, read in one snapshot (a read
    transaction of its own: the caller holds none), so that writers need not wait while it is built."""
    conn.execute("BEGIN")
    try:
        return report_fingerprint(conn, animal), build_entry(conn, animal)
    finally:
        conn.execute("COMMIT")


def keep_entry(conn: sqlite3.Connection, animal: str, fingerprint: str, entry: dict[str, Any] | None) -> None:
    """Keep a built entry under its fingerprint (in the caller's transaction; nothing for None). Should the
    rows have changed since it was built, its fingerprint no longer matches and it is built again when read."""
    if entry is None:
        return
    conn.execute("INSERT INTO report_cache (animal_id, fingerprint, entry, built_at) VALUES (?, ?, ?, ?) "
                 "ON CONFLICT (animal_id) DO UPDATE SET fingerprint = excluded.fingerprint, entry = excluded.entry, "
                 "built_at = excluded.built_at", (ensure_animal(conn, animal), fingerprint, json.dumps(entry),
                                                  time.time()))


def build_entry(conn: sqlite3.Connection, animal: str) -> dict[str, Any] | None:
    """The entry computed from the stored trials, without `consolidation`."""
    from monitor.core.session.animal_report import SessionData, animal_report

    rows = conn.execute(
        "SELECT s.id, s.start_wall, s.excluded, coalesce(s.exclusion_reason, ''), s.protocol_text, "
        "s.protocol_version, s.rig, s.label, b.counts, b.water_ul, coalesce(b.malformed, 0) "
        "FROM sessions AS s LEFT JOIN trial_builds AS b ON b.session_id = s.id "
        "WHERE s.animal = ? AND s.protocol_text IS NOT NULL ORDER BY s.started_at, s.id", (animal,)).fetchall()
    if not rows:
        return None
    protocol = protocol_of(rows[-1][4])
    trials = trials_by_session(conn, [r[0] for r in rows])
    built: dict[int, tuple[dict, float | None, int]] = {}
    for r in rows:
        if r[8] is not None:
            built[r[0]] = json.loads(r[8]), r[9], r[10]
        else:  # recorded live, not derived yet: derive in memory (read-only)
            fresh = derive(conn, r[0])
            assert fresh is not None
            trials[r[0]] = fresh[0]
            built[r[0]] = fresh[1], fresh[2], malformed_count(conn, r[0])
    data = [SessionData(trials=trials[r[0]], start=r[1], malformed_lines=built[r[0]][2], excluded=bool(r[2]),
                        exclusion_reason=r[3], protocol_version=r[5]) for r in rows]
    entry = animal_report(animal, protocol, data)
    for row, out in zip(rows, entry["sessions"]):
        counts, water, _ = built[row[0]]
        out["inter_trial"] = int(counts.get("inter_trial", 0))
        out["disagreements"] = int(counts.get("disagreements", 0))
        out["water_ul"] = water
        out["session_id"] = row[0]
        out["rig"] = row[6]
        out["label"] = row[7]
        out["conditions"] = [c["what"] + (" (sham)" if c["sham"] else "") for c in conditions_of(conn, row[0])]
    return entry
