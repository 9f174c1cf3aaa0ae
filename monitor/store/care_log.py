"""The care log in the store: supplements, weighings and health notes, and the daily ledger from them.

Rule: each record is one `care_log` row for a known animal with an aware
ISO 8601 time, who did it, and the amount (ml of a supplement, g of a
weighing) or the text of a note; rows are only added. `animal_care` gathers an
animal's records (the weight taken at each check-in counts as a weighing) and
the water earned in each of its sessions
(monitor.core.care_water over the stored events, with the rig's valve
calibration and the protocol's reward size) into `monitor.core.care.AnimalCare`,
so `day_summary` and `care_sheet` of monitor.core.care give the daily ledger
and its alerts. Advisory: the approved protocol and the veterinarian decide.
"""

from __future__ import annotations

import sqlite3
import time
from dataclasses import replace
from datetime import datetime, timedelta

from monitor.core.care import AnimalCare, CareConfig, HealthNote, Supplement, Weighing
from monitor.store.derive import protocol_of, session_events
from monitor.store.records import RecordError, find_animal, valve_calibration


def _animal_id(conn: sqlite3.Connection, animal: str) -> int:
    known = find_animal(conn, animal)
    if known is None:
        raise RecordError(f"animal: no animal {animal!r} in the database")
    return known.id


def _at(text: str) -> datetime:
    try:
        moment = datetime.fromisoformat(text)
    except (TypeError, ValueError):
        moment = None
    if moment is None or moment.tzinfo is None:
        raise RecordError(f"time: expected ISO 8601 date-time with a UTC offset, got {text!r}")
    return moment


def _add(conn: sqlite3.Connection, animal: str, kind: str, at: str, by: str, amount: float | None,
         text: str | None) -> int:
    _at(at)
    if not by or not by.strip():
        raise RecordError("by: who did it is needed")
    cur = conn.execute("INSERT INTO care_log (animal_id, kind, at, amount, by, text, recorded_at) "
                       "VALUES (?, ?, ?, ?, ?, ?, ?)", (_animal_id(conn, animal), kind, at, amount, by, text,
                                                        time.time()))
    return int(cur.lastrowid)


def add_supplement(conn: sqlite3.Connection, animal: str, *, at: str, ml: float, by: str, note: str = "") -> int:
    if not ml > 0:
        raise RecordError(f"ml: a supplement is more than 0 ml, got {ml!r}")
    return _add(conn, animal, "supplement", at, by, float(ml), note or None)


def add_weighing(conn: sqlite3.Connection, animal: str, *, at: str, grams: float, by: str) -> int:
    if not grams > 0:
        raise RecordError(f"grams: a weight is more than 0 g, got {grams!r}")
    return _add(conn, animal, "weight", at, by, float(grams), None)


def add_note(conn: sqlite3.Connection, animal: str, *, at: str, by: str, text: str) -> int:
    if not text or not text.strip():
        raise RecordError("text: a health note needs its text")
    return _add(conn, animal, "note", at, by, None, text)


def animal_care(conn: sqlite3.Connection, animal: str, config: CareConfig,
                since: datetime | None = None) -> AnimalCare:
    """Everything the care ledger needs for one animal, from the store (sessions started before `since` skipped)."""
    from monitor.core.care_water import session_water

    known = find_animal(conn, animal)
    if known is None:
        raise RecordError(f"animal: no animal {animal!r} in the database")
    supplements, weighings, notes = [], [], []
    for kind, at, amount, by, text in conn.execute(
            "SELECT kind, at, amount, by, text FROM care_log WHERE animal_id = ? ORDER BY at, id", (known.id,)):
        moment = datetime.fromisoformat(at)
        if kind == "supplement":
            supplements.append(Supplement(moment, amount, by, text or ""))
        elif kind == "weight":
            weighings.append(Weighing(moment, amount, by))
        else:
            notes.append(HealthNote(moment, by, text))
    # the weight taken at check-in is a weighing too (the trainer weighs the animal before the session)
    for grams, at, by in conn.execute(
            "SELECT c.weight_before_g, s.start_wall, c.operator FROM checkins AS c JOIN sessions AS s "
            "ON s.id = c.session_id WHERE c.animal_id = ? AND c.weight_before_g IS NOT NULL", (known.id,)):
        weighings.append(Weighing(datetime.fromisoformat(at), grams, by))
    weighings.sort(key=lambda w: w.time)
    sessions = []
    rows = conn.execute("SELECT id, start_wall, started_at, ended_at, rig, protocol_text FROM sessions "
                        "WHERE animal = ? ORDER BY started_at, id", (animal,)).fetchall()
    for number, (session_id, start_wall, started_at, ended_at, rig, text) in enumerate(rows, start=1):
        start = datetime.fromisoformat(start_wall)
        if since is not None and start.tzinfo is not None and start < since:
            continue
        # a session still running has no end yet: its water is not the day's until it ends
        end = None if ended_at is None else start + timedelta(seconds=ended_at - started_at)
        reward_ul = protocol_of(text).reward_ul if text else None
        water = session_water(session_events(conn, session_id), ul_per_ms=valve_calibration(conn, rig),
                              reward_ul=reward_ul, max_valve_ms=config.max_valve_ms,
                              lick_window_ms=config.lick_window_ms, session=str(number), end=end)
        sessions.append(replace(water, start=start))      # named by the animal's own session count
    return AnimalCare(animal, known.baseline_weight_g, tuple(sessions), tuple(supplements), tuple(weighings),
                      tuple(notes), species=known.species)
