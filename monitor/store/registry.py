"""The register of animals, rigs and protocols, and the audited records around sessions: check-ins, conditions, exclusions.

Rule: every function takes a connection and runs inside the caller's
transaction (the writer's `call()`, or a command's `BEGIN IMMEDIATE`). An
animal's name is unique; a protocol is stored once per (name, version) and a
different text under a stored (name, version) is refused ("bump the
version"). A session belongs to the animal checked in, not to the box: a
check-in opens a session for (animal, rig) with the operator, the weight
before, the stage and protocol version in force, and a warning when the rig
is not one of the animal's usual boxes; a check-out closes it. Conditions
(surgery, inactivation, infusion, ...) attach to sessions. An excluded session
keeps its data but is left out of curves and fits, with its reason. A subject
field that `ensure_animal` changes is written to the animal's change log.
Bad values raise `RecordError` naming the field.
"""

from __future__ import annotations

import json
import sqlite3
import time
from datetime import date, datetime
from typing import Any, NamedTuple

ANIMAL_FIELDS = ("cohort", "species", "strain", "sex", "date_of_birth", "genotype", "usual_boxes",
                 "baseline_weight_g")
SEXES = ("F", "M", "U", "O")  # NWB's subject sex codes
AUTOMATIC = "rigside"  # who a change is logged as when no person is named (care baseline, the demo)


class RecordError(ValueError):
    """A value that cannot be recorded; the message names the field."""


class Animal(NamedTuple):
    id: int
    name: str
    cohort: str | None
    species: str | None
    strain: str | None
    sex: str | None
    date_of_birth: str | None
    genotype: str | None
    usual_boxes: tuple[str, ...]
    baseline_weight_g: float | None


def _check_animal_fields(fields: dict[str, Any]) -> dict[str, Any]:
    unknown = set(fields) - set(ANIMAL_FIELDS)
    if unknown:
        raise RecordError(f"{sorted(unknown)[0]}: not an animal field (known: {', '.join(ANIMAL_FIELDS)})")
    out = dict(fields)
    if out.get("sex") is not None and out["sex"] not in SEXES:
        raise RecordError(f"sex: expected one of {', '.join(SEXES)}, got {out['sex']!r}")
    if out.get("date_of_birth") is not None:
        try:
            date.fromisoformat(out["date_of_birth"])
        except (TypeError, ValueError):
            raise RecordError(f"date_of_birth: expected an ISO date, got {out['date_of_birth']!r}") from None
    weight = out.get("baseline_weight_g")
    if weight is not None and not (isinstance(weight, (int, float)) and weight > 0):
        raise RecordError(f"baseline_weight_g: expected grams above 0, got {weight!r}")
    if "usual_boxes" in out:
        boxes = out["usual_boxes"]
        out["usual_boxes"] = None if boxes is None else json.dumps(list(boxes))
    return out


def ensure_animal(conn: sqlite3.Connection, name: str, by: str = AUTOMATIC, **fields: Any) -> int:
    """The id of animal `name`, created on first use; given fields are stored (None leaves one as it is).

    A field that changes is logged in the animal's change log (monitor.store.animals) as made by `by`.
    """
    from monitor.store.animals import log_changes

    if not isinstance(name, str) or not name.strip():
        raise RecordError("animal: a name is needed")
    values = {k: v for k, v in _check_animal_fields(fields).items() if v is not None}
    row = conn.execute("SELECT id FROM animals WHERE name = ?", (name,)).fetchone()
    if row is None:
        cols = ["name", "created_at", *values]
        cur = conn.execute(f"INSERT INTO animals ({', '.join(cols)}) VALUES ({', '.join('?' * len(cols))})",
                           (name, time.time(), *values.values()))
        log_changes(conn, int(cur.lastrowid), {k: None for k in values}, values, by)
        return int(cur.lastrowid)
    if values:
        old = dict(zip(values, conn.execute(f"SELECT {', '.join(values)} FROM animals WHERE id = ?",
                                            (row[0],)).fetchone()))
        changed = {k: v for k, v in values.items() if old[k] != v}
        if changed:
            conn.execute(f"UPDATE animals SET {', '.join(f'{k} = ?' for k in changed)} WHERE id = ?",
                         (*changed.values(), row[0]))
            log_changes(conn, int(row[0]), old, changed, by)
    return int(row[0])


def session_count(conn: sqlite3.Connection, animal: str) -> int:
    """How many sessions the store holds for the animal: its own session count (a person's session number)."""
    return conn.execute("SELECT count(*) FROM sessions WHERE animal = ?", (animal,)).fetchone()[0]


def find_animal(conn: sqlite3.Connection, name: str) -> Animal | None:
    row = conn.execute("SELECT id, name, cohort, species, strain, sex, date_of_birth, genotype, usual_boxes, "
                       "baseline_weight_g FROM animals WHERE name = ?", (name,)).fetchone()
    if row is None:
        return None
    boxes = tuple(json.loads(row[8])) if row[8] else ()
    return Animal(*row[:8], boxes, row[9])


def animal_names(conn: sqlite3.Connection) -> list[str]:
    """Every animal with at least one session or record, by name."""
    return [r[0] for r in conn.execute(
        "SELECT name FROM animals UNION SELECT animal FROM sessions ORDER BY 1")]


def ensure_rig(conn: sqlite3.Connection, name: str, *, usb_serial: str | None = None, port: str | None = None,
               valve_ul_per_ms: float | None = None, calibration_checked: str | None = None) -> int:
    """The id of rig `name`, created on first use; given bindings and calibration are stored."""
    if valve_ul_per_ms is not None and not valve_ul_per_ms > 0:
        raise RecordError(f"valve_ul_per_ms: expected µL per ms above 0, got {valve_ul_per_ms!r}")
    if calibration_checked is not None:
        try:
            date.fromisoformat(calibration_checked)
        except ValueError:
            raise RecordError(f"calibration_checked: expected an ISO date, got {calibration_checked!r}") from None
    values = {k: v for k, v in (("usb_serial", usb_serial), ("port", port), ("valve_ul_per_ms", valve_ul_per_ms),
                                ("calibration_checked", calibration_checked)) if v is not None}
    row = conn.execute("SELECT id FROM rigs WHERE name = ?", (name,)).fetchone()
    if row is None:
        cols = ["name", "created_at", *values]
        cur = conn.execute(f"INSERT INTO rigs ({', '.join(cols)}) VALUES ({', '.join('?' * len(cols))})",
                           (name, time.time(), *values.values()))
        return int(cur.lastrowid)
    if values:
        conn.execute(f"UPDATE rigs SET {', '.join(f'{k} = ?' for k in values)} WHERE id = ?",
                     (*values.values(), row[0]))
    return int(row[0])


def valve_calibration(conn: sqlite3.Connection, rig: str | None) -> float | None:
    """The rig's valve calibration in µL per ms, or None when not known."""
    row = conn.execute("SELECT valve_ul_per_ms FROM rigs WHERE name = ?", (rig,)).fetchone()
    return None if row is None else row[0]


def ensure_protocol(conn: sqlite3.Connection, name: str, version: int, text: str) -> int:
    """The id of protocol (name, version); a different text under the same pair is refused."""
    row = conn.execute("SELECT id, text FROM protocols WHERE name = ? AND version = ?", (name, version)).fetchone()
    if row is None:
        cur = conn.execute("INSERT INTO protocols (name, version, text, created_at) VALUES (?, ?, ?, ?)",
                           (name, version, text, time.time()))
        return int(cur.lastrowid)
    if row[1] != text:
        raise RecordError(f"protocol {name!r} version {version} is already stored with a different text: "
                          "bump [protocol] version when the protocol changes")
    return int(row[0])


def check_in(conn: sqlite3.Connection, *, animal: str, rig: str, operator: str, protocol_id: int | None,
             weight_before_g: float | None = None, stage: str | None = None, source_id: int | None = None,
             when: float | None = None) -> tuple[int, str | None]:
    """Open a session for the animal checked into `rig`; return (session id, warning or None)."""
    if not operator or not operator.strip():
        raise RecordError("operator: who checks the animal in is needed")
    if weight_before_g is not None and not weight_before_g > 0:
        raise RecordError(f"weight_before_g: expected grams above 0, got {weight_before_g!r}")
    animal_id = ensure_animal(conn, animal)
    known = find_animal(conn, animal)
    assert known is not None
    warning = None
    if known.usual_boxes and rig not in known.usual_boxes:
        warning = f"{animal} is usually in {', '.join(known.usual_boxes)}, not {rig}"
    name = version = text = None
    if protocol_id is not None:
        name, version, text = conn.execute("SELECT name, version, text FROM protocols WHERE id = ?",
                                           (protocol_id,)).fetchone()
    now = time.time() if when is None else when
    cur = conn.execute(
        "INSERT INTO sessions (source_id, animal, rig, protocol_name, protocol_version, protocol_text, started_at, "
        "start_wall, animal_id, protocol_id, stage) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
        (source_id, animal, rig, name, version, text, now, iso_local(now), animal_id, protocol_id, stage))
    session_id = int(cur.lastrowid)
    conn.execute("INSERT INTO checkins (session_id, animal_id, rig, operator, weight_before_g, stage, protocol_id, "
                 "warning, checked_in_at) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?)",
                 (session_id, animal_id, rig, operator, weight_before_g, stage, protocol_id, warning, now))
    return session_id, warning


def check_out(conn: sqlite3.Connection, session_id: int, when: float | None = None) -> None:
    """Close a checked-in session."""
    now = time.time() if when is None else when
    if conn.execute("UPDATE checkins SET checked_out_at = ? WHERE session_id = ? AND checked_out_at IS NULL",
                    (now, session_id)).rowcount != 1:
        raise RecordError(f"session {session_id}: not checked in, or already checked out")
    conn.execute("UPDATE sessions SET ended_at = ? WHERE id = ?", (now, session_id))


def add_condition(conn: sqlite3.Connection, session_id: int, *, what: str, operator: str, at: str,
                  dose: str | None = None, volume_ul: float | None = None, sham: bool = False,
                  notes: str | None = None) -> int:
    """Attach a condition or manipulation to a session."""
    if not what or not what.strip():
        raise RecordError("what: say what was done")
    if not operator or not operator.strip():
        raise RecordError("operator: who did it is needed")
    aware_time("at", at)
    if conn.execute("SELECT 1 FROM sessions WHERE id = ?", (session_id,)).fetchone() is None:
        raise RecordError(f"session: no session {session_id}")
    cur = conn.execute("INSERT INTO conditions (session_id, what, dose, volume_ul, sham, notes, operator, at) "
                       "VALUES (?, ?, ?, ?, ?, ?, ?, ?)", (session_id, what, dose, volume_ul, int(sham), notes,
                                                           operator, at))
    return int(cur.lastrowid)


def conditions_of(conn: sqlite3.Connection, session_id: int) -> list[dict[str, Any]]:
    cur = conn.execute("SELECT id, what, dose, volume_ul, sham, notes, operator, at FROM conditions "
                       "WHERE session_id = ? ORDER BY id", (session_id,))
    names = [d[0] for d in cur.description]
    return [dict(zip(names, row)) for row in cur]


def exclude_session(conn: sqlite3.Connection, session_id: int, reason: str, by: str,
                    excluded: bool = True) -> None:
    """Flag a session excluded (kept, but left out of curves and fits), or include it again."""
    if not reason or not reason.strip():
        raise RecordError("reason: an exclusion (or its undoing) needs a reason")
    if not by or not by.strip():
        raise RecordError("operator: who excludes the session is needed")
    if conn.execute("UPDATE sessions SET excluded = ?, exclusion_reason = ?, excluded_by = ?, excluded_at = ? "
                    "WHERE id = ?", (int(excluded), reason, by, time.time(), session_id)).rowcount != 1:
        raise RecordError(f"session: no session {session_id}")


def aware_time(name: str, text: str) -> datetime:
    """`text` as an ISO 8601 date-time with a UTC offset; a RecordError naming `name` otherwise."""
    try:
        moment = datetime.fromisoformat(text)
    except (TypeError, ValueError):
        moment = None
    if moment is None or moment.tzinfo is None:
        raise RecordError(f"{name}: expected ISO 8601 date-time with a UTC offset, got {text!r}")
    return moment


def iso_local(epoch: float) -> str:
    """Epoch seconds as ISO 8601 in this PC's time zone, with its offset."""
    return datetime.fromtimestamp(epoch).astimezone().isoformat(timespec="seconds")
