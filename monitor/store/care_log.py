"""The care log in the store: supplements, weighings and health notes, and the daily ledger from them.

Rule: each record is one `care_log` row for a known animal with an aware
ISO 8601 time, who did it, and the amount (ml of a supplement, g of a
weighing) or the text of a note; rows are only added, each hash-chained to
the one before (monitor.core.care.chain) in the caller's transaction, and
triggers refuse UPDATE and DELETE. A weighing or supplement is judged against
the species' plausibility limits, narrowed by the `[care_limits]` of the
protocol of the animal's latest session (monitor.core.care.limits): refused, or
stored only with a person's `confirmed` reason. An entry is voided or
corrected by a new entry naming it (`replaces`, `action`, `reason`, who);
the original stays, and the ledger reads only entries neither voided nor
corrected. `animal_care` gathers an
animal's records (the weight taken at each check-in counts as a weighing) and
the water earned in each of its sessions
(monitor.core.care.water over the stored events, with the rig's valve
calibration and the protocol's reward size) into `monitor.core.care.ledger.AnimalCare`,
so `day_summary` and `care_sheet` of monitor.core.care.ledger give the daily ledger
and its alerts. Advisory: the approved protocol and the veterinarian decide.
"""

from __future__ import annotations

import sqlite3
import time
from dataclasses import replace
from datetime import datetime, timedelta

from monitor.core.care.ledger import AnimalCare, CareConfig, HealthNote, Supplement, Weighing
from monitor.core.care.chain import GENESIS, CareChainCheck, care_hash, verify_care_chain
from monitor.core.care.limits import (CareLimits, Concern, limits_for, supplement_concerns, weighing_concerns,
                                      with_protocol)
from monitor.store.derive import protocol_of, session_events
from monitor.store.registry import RecordError, aware_time, find_animal, valve_calibration

# the columns an entry's hash covers, in the order they are read
CHAINED = ("id", "animal_id", "kind", "at", "amount", "by", "text", "recorded_at", "replaces", "action", "reason",
           "confirmed")
# entries the ledger reads: neither a void nor replaced by a later void or correction
_LIVE = "action IS NOT 'void' AND id NOT IN (SELECT replaces FROM care_log WHERE replaces IS NOT NULL)"


class NeedsConfirmation(RecordError):
    """A value outside the usual range: stored only with a person's reason (`confirmed`)."""


def _animal_id(conn: sqlite3.Connection, animal: str) -> int:
    known = find_animal(conn, animal)
    if known is None:
        raise RecordError(f"animal: no animal {animal!r} in the database")
    return known.id


def _insert(conn: sqlite3.Connection, **row: object) -> int:
    """Append one chained entry (caller holds BEGIN IMMEDIATE); its id."""
    last = conn.execute("SELECT id, hash FROM care_log ORDER BY id DESC LIMIT 1").fetchone()
    content = {name: row.get(name) for name in CHAINED}
    content["id"] = (last[0] + 1) if last else 1
    content["recorded_at"] = time.time()
    prev = last[1] if last else GENESIS
    digest = care_hash(prev, content)
    conn.execute(f"INSERT INTO care_log ({', '.join(CHAINED)}, prev_hash, hash) VALUES "
                 f"({', '.join('?' * (len(CHAINED) + 2))})", (*content.values(), prev, digest))
    return int(content["id"])


def chain_existing(conn: sqlite3.Connection) -> None:
    """Chain entries stored before the care log had a chain (a migration step; no triggers yet)."""
    prev = GENESIS
    for row in conn.execute(f"SELECT {', '.join(CHAINED)} FROM care_log ORDER BY id").fetchall():
        digest = care_hash(prev, dict(zip(CHAINED, row)))
        conn.execute("UPDATE care_log SET prev_hash = ?, hash = ? WHERE id = ?", (prev, digest, row[0]))
        prev = digest


def verify(conn: sqlite3.Connection) -> CareChainCheck:
    """Rebuild every entry's hash from its columns, in insertion order."""
    rows = conn.execute(f"SELECT {', '.join(CHAINED)}, prev_hash, hash FROM care_log ORDER BY id").fetchall()
    return verify_care_chain([(r[0], dict(zip(CHAINED, r[:len(CHAINED)])), r[-2], r[-1]) for r in rows])


def _add(conn: sqlite3.Connection, animal: str, kind: str, at: str, by: str, amount: float | None,
         text: str | None, concerns: list[Concern] = (), confirmed: str | None = None) -> int:
    aware_time("time", at)
    if not by or not by.strip():
        raise RecordError("by: who did it is needed")
    return _insert(conn, animal_id=_animal_id(conn, animal), kind=kind, at=at, amount=amount, by=by, text=text,
                   confirmed=_judged(kind, concerns, confirmed))


def _judged(kind: str, concerns: list[Concern], confirmed: str | None) -> str | None:
    """Raise for a refused value or an unconfirmed unusual one; the confirmation to keep (None if not asked)."""
    field = "grams" if kind == "weight" else "ml"
    for concern in concerns:
        if concern.refused:
            raise RecordError(f"{field}: {concern.text}; not recorded")
    asks = [c.text for c in concerns if not c.refused]
    if asks and not (confirmed and confirmed.strip()):
        raise NeedsConfirmation(f"{field}: {'; '.join(asks)}; if it is right, confirm it with a reason")
    return confirmed.strip() if asks and confirmed else None


def _limits(conn: sqlite3.Connection, animal_id: int) -> CareLimits:
    """The animal's species limits, narrowed by the `[care_limits]` of its latest session's protocol."""
    species = conn.execute("SELECT species FROM animals WHERE id = ?", (animal_id,)).fetchone()
    limits = limits_for(species[0] if species else None)
    row = conn.execute("SELECT protocol_text FROM sessions WHERE animal = (SELECT name FROM animals WHERE id = ?) "
                       "AND protocol_text IS NOT NULL ORDER BY started_at DESC, id DESC LIMIT 1",
                       (animal_id,)).fetchone()
    return with_protocol(limits, protocol_of(row[0]).care_limits) if row else limits


def add_supplement(conn: sqlite3.Connection, animal: str, *, at: str, ml: float, by: str, note: str = "",
                   confirmed: str | None = None) -> int:
    if not ml > 0:
        raise RecordError(f"ml: a supplement is more than 0 ml, got {ml!r}")
    concerns = supplement_concerns(float(ml), _limits(conn, _animal_id(conn, animal)))
    return _add(conn, animal, "supplement", at, by, float(ml), note or None, concerns, confirmed)


def add_weighing(conn: sqlite3.Connection, animal: str, *, at: str, grams: float, by: str,
                 confirmed: str | None = None) -> int:
    if not grams > 0:
        raise RecordError(f"grams: a weight is more than 0 g, got {grams!r}")
    moment = aware_time("time", at)
    last = None
    for when, amount in conn.execute(
            f"SELECT at, amount FROM care_log WHERE animal_id = ? AND kind = 'weight' AND {_LIVE}",
            (_animal_id(conn, animal),)):
        stamp = datetime.fromisoformat(when)
        if stamp <= moment and (last is None or stamp >= last[0]):
            last = (stamp, amount)
    concerns = weighing_concerns(float(grams), _limits(conn, _animal_id(conn, animal)), moment, last)
    return _add(conn, animal, "weight", at, by, float(grams), None, concerns, confirmed)


def add_note(conn: sqlite3.Connection, animal: str, *, at: str, by: str, text: str) -> int:
    if not text or not text.strip():
        raise RecordError("text: a health note needs its text")
    return _add(conn, animal, "note", at, by, None, text)


def _replaceable(conn: sqlite3.Connection, entry: int) -> tuple:
    row = conn.execute("SELECT id, animal_id, kind, at, amount, text, action FROM care_log WHERE id = ?",
                       (entry,)).fetchone()
    if row is None:
        raise RecordError(f"entry: there is no care entry {entry}")
    if row[6] == "void":
        raise RecordError(f"entry: care entry {entry} is itself a void")
    later = conn.execute("SELECT id, action FROM care_log WHERE replaces = ?", (entry,)).fetchone()
    if later is not None:
        raise RecordError(f"entry: care entry {entry} was already {'voided' if later[1] == 'void' else 'corrected'} "
                          f"by entry {later[0]}")
    return row


def void_entry(conn: sqlite3.Connection, entry: int, *, by: str, reason: str) -> int:
    """Void entry `entry` with a reason; the original stays in the log. The new entry's id."""
    if not reason or not reason.strip():
        raise RecordError("reason: say why the entry is voided")
    if not by or not by.strip():
        raise RecordError("by: who did it is needed")
    _, animal_id, kind, at, _amount, _text, _ = _replaceable(conn, entry)
    return _insert(conn, animal_id=animal_id, kind=kind, at=at, amount=None, by=by, text=None, replaces=entry,
                   action="void", reason=reason.strip())


def correct_entry(conn: sqlite3.Connection, entry: int, *, by: str, reason: str, amount: float | None = None,
                  text: str | None = None, at: str | None = None, confirmed: str | None = None) -> int:
    """Replace entry `entry` by a corrected one (same kind; the original stays). The new entry's id."""
    if not reason or not reason.strip():
        raise RecordError("reason: say why the entry is corrected")
    if not by or not by.strip():
        raise RecordError("by: who did it is needed")
    _, animal_id, kind, old_at, old_amount, old_text, _ = _replaceable(conn, entry)
    at = at or old_at
    moment = aware_time("time", at)
    amount = old_amount if amount is None else float(amount)
    text = old_text if text is None else text
    concerns: list[Concern] = []
    if kind == "weight":
        if not amount > 0:
            raise RecordError(f"grams: a weight is more than 0 g, got {amount!r}")
        concerns = weighing_concerns(amount, _limits(conn, animal_id), moment)
    elif kind == "supplement":
        if not amount > 0:
            raise RecordError(f"ml: a supplement is more than 0 ml, got {amount!r}")
        concerns = supplement_concerns(amount, _limits(conn, animal_id))
    elif not text or not text.strip():
        raise RecordError("text: a health note needs its text")
    return _insert(conn, animal_id=animal_id, kind=kind, at=at, amount=amount, by=by, text=text, replaces=entry,
                   action="correct", reason=reason.strip(), confirmed=_judged(kind, concerns, confirmed))


def entries_of(conn: sqlite3.Connection, animal: str) -> list[dict]:
    """Every care entry of an animal in insertion order, with whether the ledger still reads it."""
    known = find_animal(conn, animal)
    if known is None:
        return []
    live = {r[0] for r in conn.execute(f"SELECT id FROM care_log WHERE animal_id = ? AND {_LIVE}", (known.id,))}
    rows = conn.execute(f"SELECT {', '.join(CHAINED)} FROM care_log WHERE animal_id = ? ORDER BY id", (known.id,))
    return [{**dict(zip(CHAINED, r)), "live": r[0] in live} for r in rows]


def animal_care(conn: sqlite3.Connection, animal: str, config: CareConfig,
                since: datetime | None = None) -> AnimalCare:
    """Everything the care ledger needs for one animal, from the store (sessions started before `since` skipped)."""
    from monitor.core.care.water import session_water

    known = find_animal(conn, animal)
    if known is None and conn.execute("SELECT 1 FROM sessions WHERE animal = ?", (animal,)).fetchone() is None:
        raise RecordError(f"animal: no animal {animal!r} in the database")
    known_id = known.id if known else -1  # an animal with sessions but no record yet: no care entries
    supplements, weighings, notes = [], [], []
    for kind, at, amount, by, text in conn.execute(
            f"SELECT kind, at, amount, by, text FROM care_log WHERE animal_id = ? AND {_LIVE} ORDER BY at, id",
            (known_id,)):
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
            "ON s.id = c.session_id WHERE c.animal_id = ? AND c.weight_before_g IS NOT NULL", (known_id,)):
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
        protocol = protocol_of(text) if text else None
        water = session_water(session_events(conn, session_id), ul_per_ms=valve_calibration(conn, rig),
                              reward_ul=protocol.reward_ul if protocol else None, max_valve_ms=config.max_valve_ms,
                              lick_window_ms=config.lick_window_ms, session=str(number), end=end,
                              max_reward_ul=protocol.care_limits.get("max_reward_ul") if protocol else None)
        sessions.append(replace(water, start=start))      # named by the animal's own session count
    return AnimalCare(animal, known.baseline_weight_g if known else None, tuple(sessions), tuple(supplements),
                      tuple(weighings), tuple(notes), species=known.species if known else None)
