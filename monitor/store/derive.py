"""Trials derived from stored events: rebuilt per session, never edited by hand.

Rule: a session's trials are what `monitor.core.session.derivation.derive_session` makes of
its stored events under the protocol text the session recorded (the same
segmentation the live view and the report use), with the rig's valve
calibration for water. `rebuild_trials` replaces the session's trial rows and
its `trial_builds` row (builder counts, water, malformed-line count) in the
caller's transaction, so it can be run again at any time and gives the same
rows. Events are read back from the session's rowid range when it is known
(imports record it), else by a scan of the lean events table. A session
without a protocol text gets no trials (and says so). `derive` gives the same
result without storing it (the report uses it, read-only, for a session
recorded live whose trials were not derived yet); `session_replayed` gives
the live view's session object itself (a stored session's histograms and
rolling rate, as the live page showed them).
"""

from __future__ import annotations

import json
import sqlite3
import time
from functools import lru_cache
from typing import TYPE_CHECKING, Iterable, Iterator

from drivers.wire import Event
from monitor.core.protocol import TrainingProtocol, parse_protocol
from monitor.core.session.derivation import derive_session
from monitor.core.session.trials import Trial
from monitor.store.registry import valve_calibration

if TYPE_CHECKING:
    from monitor.core.session.live_stats import LiveSession

TRIAL_COLUMNS = ("idx", "t_us", "interval_ms", "target_ms", "window_low_ms", "window_high_ms", "stage", "outcome",
                 "rewarded", "outcome_source", "computed_outcome", "segment")


@lru_cache(maxsize=64)
def protocol_of(text: str) -> TrainingProtocol:
    """The parsed protocol of a stored text (stored texts were checked when they were stored)."""
    return parse_protocol(text, "<stored protocol>")


def session_events(conn: sqlite3.Connection, session_id: int) -> Iterator[Event]:
    """The session's events in stored order, as decoder records."""
    first, last = conn.execute("SELECT first_event, last_event FROM sessions WHERE id = ?", (session_id,)).fetchone()
    where, args = "e.session_id = ?", [session_id]
    if first is not None and last is not None:
        where, args = "e.rowid BETWEEN ? AND ? AND e.session_id = ?", [first, last, session_id]
    sql = (f"SELECT e.t_us, c.name, e.value, e.raw_time, e.segment, e.line, e.wall FROM events AS e "
           f"JOIN event_codes AS c ON c.code = e.code WHERE {where} ORDER BY e.rowid")
    for t_us, name, value, raw_time, segment, line, wall in conn.execute(sql, args):
        yield Event(t_us, name, _args(name, value), raw_time, segment, line, 0, 0, wall)


def _args(name: str, value: str | None) -> tuple[str, ...]:
    if value is None:
        return ()
    return (value,) if name == "note" else tuple(value.split(" "))


def derive(conn: sqlite3.Connection, session_id: int, events: Iterable[Event] | None = None
           ) -> tuple[list[Trial], dict[str, int], float | None] | None:
    """(trials, builder counts, water µL) of a session, computed and not stored; None without a protocol."""
    text, stage, rig = conn.execute("SELECT protocol_text, stage, rig FROM sessions WHERE id = ?",
                                    (session_id,)).fetchone()
    if not text:
        return None
    return derive_events(text, stage, valve_calibration(conn, rig),
                         session_events(conn, session_id) if events is None else events)


def derive_events(protocol_text: str, stage: str | None, valve_ul_per_ms: float | None, events: Iterable[Event]
                  ) -> tuple[list[Trial], dict[str, int], float | None]:
    """(trials, builder counts, water µL) of one session's events under a protocol text; needs no database."""
    return derive_session(protocol_of(protocol_text), stage, valve_ul_per_ms, events)


def replayed(protocol_text: str, stage: str | None, valve_ul_per_ms: float | None, events: Iterable[Event]
             ) -> LiveSession:
    """The live view's own session (monitor.core.session.live_stats.LiveSession) fed a stored session's events."""
    from monitor.core.session.live_stats import LiveSession

    live = LiveSession(protocol_of(protocol_text), stage, valve_ul_per_ms=valve_ul_per_ms)
    for event in events:
        live.feed(event)
    live.finish()
    return live


def session_replayed(conn: sqlite3.Connection, session_id: int) -> LiveSession | None:
    """A stored session replayed through the live view's code (its histograms and rolling rate as the live
    page showed them); None without a protocol."""
    text, stage, rig = conn.execute("SELECT protocol_text, stage, rig FROM sessions WHERE id = ?",
                                    (session_id,)).fetchone()
    if not text:
        return None
    return replayed(text, stage, valve_calibration(conn, rig), session_events(conn, session_id))


def malformed_count(conn: sqlite3.Connection, session_id: int) -> int:
    return conn.execute("SELECT count(*) FROM raw_lines WHERE session_id = ? AND kind = 'malformed'",
                        (session_id,)).fetchone()[0]


def rebuild_trials(conn: sqlite3.Connection, session_id: int, events: Iterable[Event] | None = None) -> int:
    """Derive the session's trials again from its events (or the `events` given); return how many."""
    protocol_id = conn.execute("SELECT protocol_id FROM sessions WHERE id = ?", (session_id,)).fetchone()[0]
    conn.execute("DELETE FROM trials WHERE session_id = ?", (session_id,))
    conn.execute("DELETE FROM trial_builds WHERE session_id = ?", (session_id,))
    malformed = malformed_count(conn, session_id)
    result = derive(conn, session_id, events)
    if result is None:
        conn.execute("INSERT INTO trial_builds (session_id, protocol_id, built_at, trials, counts, water_ul, "
                     "malformed) VALUES (?, NULL, ?, 0, ?, NULL, ?)",
                     (session_id, time.time(), json.dumps({"no_protocol": 1}), malformed))
        return 0
    trials, counts, water = result
    store_trials(conn, session_id, protocol_id, [trial_row(t) for t in trials], counts, water, malformed)
    return len(trials)


def store_trials(conn: sqlite3.Connection, session_id: int, protocol_id: int | None, rows: list[tuple],
                 counts: dict[str, int], water_ul: float | None, malformed: int) -> None:
    """Insert a session's derived trial rows (`trial_row`) and its build record, in the caller's transaction."""
    conn.executemany(f"INSERT INTO trials (session_id, {', '.join(TRIAL_COLUMNS)}) VALUES "
                     f"({', '.join('?' * (len(TRIAL_COLUMNS) + 1))})",
                     [(session_id, *row) for row in rows])
    conn.execute("INSERT INTO trial_builds (session_id, protocol_id, built_at, trials, counts, water_ul, malformed) "
                 "VALUES (?, ?, ?, ?, ?, ?, ?)",
                 (session_id, protocol_id, time.time(), len(rows), json.dumps(counts, sort_keys=True), water_ul,
                  malformed))


def rebuild_missing(conn: sqlite3.Connection) -> int:
    """Derive the trials of every session that has none yet (e.g. recorded live); return how many sessions."""
    ids = [r[0] for r in conn.execute("SELECT s.id FROM sessions AS s LEFT JOIN trial_builds AS b "
                                      "ON b.session_id = s.id WHERE b.session_id IS NULL ORDER BY s.id")]
    for session_id in ids:
        rebuild_trials(conn, session_id)
    return len(ids)


def trial_row(t: Trial) -> tuple:
    """A trial as the values of TRIAL_COLUMNS."""
    interval = None if t.interval_ms != t.interval_ms else t.interval_ms  # nan -> NULL
    return (t.index, t.t_us, interval, t.target_ms, t.window_low_ms, t.window_high_ms, t.stage, t.outcome,
            int(t.rewarded), t.outcome_source, t.computed_outcome, t.segment)


def stored_trials(conn: sqlite3.Connection, session_id: int) -> list[Trial]:
    """The session's derived trials, in order."""
    rows = conn.execute(f"SELECT {', '.join(TRIAL_COLUMNS)} FROM trials WHERE session_id = ? ORDER BY idx",
                        (session_id,))
    return [_trial(r) for r in rows]


def _trial(r: tuple) -> Trial:
    return Trial(r[0], r[1], float("nan") if r[2] is None else r[2], r[3], r[4], r[5], r[6], r[7], bool(r[8]),
                 r[9], r[10], r[11])


def trials_by_session(conn: sqlite3.Connection, session_ids: list[int]) -> dict[int, list[Trial]]:
    """Trials of many sessions in one query."""
    out: dict[int, list[Trial]] = {s: [] for s in session_ids}
    if not session_ids:
        return out
    marks = ", ".join("?" * len(session_ids))
    for row in conn.execute(f"SELECT session_id, {', '.join(TRIAL_COLUMNS)} FROM trials WHERE session_id IN "
                            f"({marks}) ORDER BY session_id, idx", session_ids):
        out[row[0]].append(_trial(row[1:]))
    return out
