"""An animal's past sessions as the window's history shows them, and the newest cached fit of an animal.

Rule: read-only. `ended_sessions` reads the animal's ended sessions in time
order with their derived trials and builds (monitor.store.derive, one
segmentation with the live view); a session without a build (recorded live
and not derived yet) is segmented from its stored events under the protocol
given (`derivation.derive_session`, the trial rules the live view uses). Each session
carries its start (local, to the minute), rig, builder counts, water,
malformed-line count, exclusion and its reason, conditions, and the hours
since the previous session ended (23 when unknown, as the model assumes).
`fit_block` is the newest cached consolidation block with its "current" flag
and the cached filter for a running session ("live").
"""

from __future__ import annotations

import json
import sqlite3
from collections.abc import Callable, Mapping
from typing import Any, NamedTuple

from monitor.core.protocol import TrainingProtocol
from monitor.core.session.derivation import derive_session
from monitor.core.session.trials import Trial
from monitor.store.derive import malformed_count, session_events, trials_by_session
from monitor.store.fits import block_of, latest_fit
from monitor.store.registry import conditions_of

DEFAULT_BREAK_H = 23.0   # hours between sessions when one end is unknown
_CHUNK = 500             # ids per IN (...) query


class HistorySession(NamedTuple):
    """One past session of an animal, segmented, with what the store knows of it."""

    trials: tuple[Trial, ...]
    start: str = ""                 # local start time, formatted
    rig: str = ""
    counts: Mapping[str, int] = {}
    water_ul: float | None = None
    malformed_lines: int = 0
    excluded: bool = False
    exclusion_reason: str = ""
    conditions: str = ""
    break_hours: float = DEFAULT_BREAK_H   # since the previous session ended
    session_id: int | None = None   # the store's id (exclusions and conditions refer to it)


def _hours_between(end: float | None, start: float | None) -> float:
    if end is None or start is None or start <= end:
        return DEFAULT_BREAK_H
    return (start - end) / 3600.0


def _builds(conn: sqlite3.Connection, ids: list[int]) -> dict[int, tuple[str, float | None, int]]:
    """session id -> (builder counts JSON, water µL, malformed lines) of the sessions that have a build."""
    out: dict[int, tuple[str, float | None, int]] = {}
    for part in (ids[i:i + _CHUNK] for i in range(0, len(ids), _CHUNK)):
        query = ("SELECT session_id, counts, water_ul, malformed FROM trial_builds WHERE session_id IN "
                 f"({', '.join('?' * len(part))})")
        out.update({r[0]: r[1:] for r in conn.execute(query, part)})
    return out


def ended_sessions(conn: sqlite3.Connection, animal: str, protocol: TrainingProtocol,
                   progress: Callable[[float, str], None] = lambda f, m: None) -> list[HistorySession]:
    """The animal's ended sessions in time order; `progress(fraction, words)` once per session."""
    rows = conn.execute("SELECT id, rig, start_wall, started_at, ended_at, excluded, coalesce(exclusion_reason, '') "
                        "FROM sessions WHERE animal = ? AND ended_at IS NOT NULL ORDER BY started_at, id",
                        (animal,)).fetchall()
    ids = [r[0] for r in rows]
    stored, builds = trials_by_session(conn, ids), _builds(conn, ids)
    out: list[HistorySession] = []
    previous_end = None
    for k, (session_id, rig, start_wall, started, ended, excluded, reason) in enumerate(rows):
        progress(k / max(len(rows), 1), f"session {k + 1} of {len(rows)}")
        if session_id in builds:
            counts_text, water, malformed = builds[session_id]
            trials, counts = stored.get(session_id, []), json.loads(counts_text)
        else:
            trials, counts, water = derive_session(protocol, None, None, session_events(conn, session_id))
            malformed = malformed_count(conn, session_id)
        conditions = "; ".join(c["what"] for c in conditions_of(conn, session_id))
        out.append(HistorySession(tuple(trials), start_wall[:16].replace("T", " "), rig, counts, water, malformed,
                                  bool(excluded), reason, conditions, _hours_between(previous_end, started),
                                  session_id))
        previous_end = ended
    return out


def fit_block(conn: sqlite3.Connection, animal: str) -> dict[str, Any]:
    """The newest consolidation block of `animal` with "current", and its cached filter as "live" (or None)."""
    fit = latest_fit(conn, animal)
    return {**block_of(fit, None), "live": fit["params"].get("live") if fit else None}
