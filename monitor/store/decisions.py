"""The decision log in the store: insert-only rows of the hash chain of monitor.core.eligibility.decision_log.

Rule: an entry is appended in the caller's `BEGIN IMMEDIATE` transaction:
the last entry (by insertion order) and, for a correction, the corrected one
are read inside it, chained with `append`, and inserted with every content
field as a column, the canonical payload and the hash, so two processes
cannot both take the same seq. Nothing updates or deletes a row (triggers
refuse it too). Verification reads rows in insertion order (`id`), rebuilds
each entry from its columns — not from its payload, so an edited column
shows — and lets `verify_chain` name the first broken entry, using the stored
payloads to name an edited field.
"""

from __future__ import annotations

import sqlite3
from typing import Sequence

from monitor.core.eligibility.decision_log import ChainCheck, Decision, Head, LogEntry, append, head, verify_chain

# content field -> column (`group` is an SQL keyword)
_COLUMNS = {"seq": "seq", "prev_hash": "prev_hash", "algorithm": "algorithm", "decision": "decision",
            "animal": "animal", "operator": "operator", "reason": "reason", "time": "time", "group": "group_name",
            "group_code": "group_code", "planned_manipulation": "planned_manipulation",
            "planned_date": "planned_date", "assignment_method": "assignment_method",
            "assignment_seed": "assignment_seed", "snapshot": "snapshot", "rule_state": "rule_state",
            "disagrees_with_rule": "disagrees_with_rule", "corrects": "corrects"}
_SELECT = f"SELECT {', '.join(_COLUMNS.values())}, payload, hash FROM decisions"


def _entry(row: sqlite3.Row | tuple) -> tuple[LogEntry, str]:
    fields = dict(zip(_COLUMNS, row[:len(_COLUMNS)]))
    payload, digest = row[len(_COLUMNS)], row[len(_COLUMNS) + 1]
    return LogEntry.from_content(fields, digest), payload


def entries(conn: sqlite3.Connection, animal: str | None = None) -> list[LogEntry]:
    """Entries in insertion order (optionally one animal's)."""
    sql, args = (_SELECT + " ORDER BY id", ()) if animal is None else \
        (_SELECT + " WHERE animal = ? ORDER BY id", (animal,))
    return [_entry(r)[0] for r in conn.execute(sql, args)]


def append_decision(conn: sqlite3.Connection, decision: Decision, key: bytes | None = None) -> LogEntry:
    """Chain `decision` after the last entry and insert it (caller holds BEGIN IMMEDIATE)."""
    last_row = conn.execute(_SELECT + " ORDER BY id DESC LIMIT 1").fetchone()
    previous = None if last_row is None else _entry(last_row)[0]
    corrected = None
    if decision.corrects is not None:
        row = conn.execute(_SELECT + " WHERE seq = ?", (decision.corrects,)).fetchone()
        if row is None:
            raise ValueError(f"corrects: there is no entry {decision.corrects}")
        corrected = _entry(row)[0]
    entry = append(previous, decision, key, corrected)
    content = entry.content()
    snapshot = decision.snapshot.text if decision.snapshot is not None else None
    values = [snapshot if name == "snapshot" else content[name] for name in _COLUMNS]
    values[list(_COLUMNS).index("disagrees_with_rule")] = int(decision.disagrees_with_rule)
    conn.execute(f"INSERT INTO decisions ({', '.join(_COLUMNS.values())}, payload, hash) "
                 f"VALUES ({', '.join('?' * (len(_COLUMNS) + 2))})", (*values, entry.payload(), entry.hash))
    return entry


def verify(conn: sqlite3.Connection, key: bytes | None = None, heads: Sequence[Head] = ()) -> ChainCheck:
    """Check the whole stored chain (see the module rule)."""
    rows = [_entry(r) for r in conn.execute(_SELECT + " ORDER BY id")]
    return verify_chain([e for e, _ in rows], key, heads, payloads=[p for _, p in rows])


def chain_head(conn: sqlite3.Connection) -> Head | None:
    return head(entries(conn))
