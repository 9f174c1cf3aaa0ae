"""What one session's NWB file holds, read from the store (monitor.store.nwb_file writes it).

Rule: each session becomes `sub-<animal>_ses-<NNN>_behavior.nwb` (NNN: the
animal's own session count in time order, also the `session_id`; the animal's
name with every character outside letters, digits and `-` made `-`).
Subject: the animal's record (monitor.store.animals: species, sex, date of
birth and age at the session, strain, genotype; lab id, cohort and supplier
in its description) and its weight on the session's day (the check-in
weight, else the care log's last weighing of that day). Session:
experimenter (the operator who checked it in), description, institution,
lab, keywords and experiment description (the settings' `[export]` table),
protocol name and version, stage and conditions. Trials run from trial start
to trial end (monitor.core.session.trial_spans) with our TRIAL_FIELDS; the
events table `rig_events` holds every event with its word as a categorical
column; the manipulations in force, when any, are the `manipulations` table
of the `behavior` processing module (monitor.store.nwb_manipulations). Times
are seconds after `session_start_time` on the device clock
(segments continue from the last time seen, as in
monitor.core.session.trials). NUL in a note is written as the text `\\x00`
(HDF5 strings cannot hold it).
"""

from __future__ import annotations

import re
import sqlite3
import uuid
from dataclasses import dataclass
from datetime import date, datetime, time as clock
from typing import Any, Iterable

import numpy as np

from monitor.store.animals import get_animal
from monitor.store.derive import derive, protocol_of, stored_trials
from monitor.store.event_blocks import EventBlock, event_words, session_block
from monitor.store.nwb_file import Column, Content, Module, Table
from monitor.store.nwb_manipulations import manipulations_table
from monitor.store.registry import conditions_of
from monitor.store.session_time import SessionClock, start_shift_us

_ID = re.compile(r"[^A-Za-z0-9-]")
TRIAL_FIELDS = (("first_press_time", "s", "first press or crossing of the trial (s after session start)"),
                ("interval_ms", "ms", "inter-press interval or hold time (NaN when none)"),
                ("outcome", "", "the rig's outcome word when it sent one, else rigside's classification"),
                ("rewarded", "", "the trial was rewarded"),
                ("outcome_source", "", "rig | computed"),
                ("computed_outcome", "", "rigside's own classification from the protocol"),
                ("target_ms", "ms", "target interval in force"),
                ("window_low_ms", "ms", "low edge of the reward window in force"),
                ("window_high_ms", "ms", "high edge of the reward window in force"),
                ("stage", "", "shaping stage in force"),
                ("segment", "", "device clock segment (a board reset starts a new one)"))
BEHAVIOR = "session-level behavioral annotations: the manipulations in force during this session"
DEFAULT_KEYWORDS = ("behavior", "operant conditioning", "motor timing", "motor skill learning")
DEFAULT_EXPERIMENT = ("Operant training of a motor timing task (two lever presses a target delay apart, or a "
                      "joystick push held for a target time), recorded from the box's event stream by rigside.")


def file_name(animal: str, number: int) -> str:
    """The session's file name in the repository layout."""
    return f"sub-{subject_label(animal)}_ses-{number:03d}_behavior.nwb"


def subject_label(animal: str) -> str:
    return _ID.sub("-", animal) or "unnamed"


def _narrow(values: np.ndarray) -> np.ndarray:
    """The same integers in the smallest unsigned type that holds them (they compress better)."""
    if len(values) and values.min() >= 0:
        for dtype in (np.uint8, np.uint16, np.uint32):
            if values.max() <= np.iinfo(dtype).max:
                return values.astype(dtype)
    return values


def _text(value: str) -> str:
    return value.replace("\x00", "\\x00")


def _categorical(name: str, description: str, values: list[str]) -> Column:
    """An EnumData column: one small code per row, each distinct text stored once."""
    words = sorted(set(values))
    index = {w: i for i, w in enumerate(words)}
    dtype = np.uint8 if len(words) <= 256 else np.uint16 if len(words) <= 65536 else np.uint32
    return Column(name, description, np.fromiter((index[v] for v in values), dtype=dtype, count=len(values)),
                  words=words)


@dataclass(frozen=True)
class _Events:
    """A session's events: the stored columns, each event's word and its session time (µs)."""

    block: EventBlock
    words: list[str]
    relative_us: np.ndarray

    def times_of(self, word: str) -> list[int]:
        return sorted(self.relative_us[[w == word for w in self.words]].tolist()) if self.words else []


def _events_table(events: _Events, shift_us: int) -> Table:
    """The `rig_events` table, built column by column."""
    block = events.block
    columns = [
        Column("timestamp", "seconds after session_start_time on the device clock (clock segments continue from "
               "the last time seen)", (shift_us + events.relative_us) / 1e6, resolution=1e-6),
        _categorical("event", "event word", events.words),
        _categorical("value", "arguments, joined by one space (empty when none)",
                     [_text(v) if v else "" for v in block.value]),
        Column("segment", "device clock segment", _narrow(block.array("segment"))),
        Column("line", "line number in the source", _narrow(block.array("line"))),
        Column("raw_time", "the device counter as sent", _narrow(block.array("raw_time")))]
    return Table("rig_events", "EventsTable", "every event line the rig sent, in order", columns, len(block))


def _trials_table(trials: list, spans: list[tuple[int, int]], shift_us: int) -> Table:
    def seconds(values: Iterable[float]) -> np.ndarray:
        return np.array([(shift_us + v) / 1e6 for v in values], dtype=np.float64)

    data: dict[str, Any] = {
        "start_time": seconds(b for b, _ in spans), "stop_time": seconds(e for _, e in spans),
        "first_press_time": seconds(t.t_us for t in trials),
        "interval_ms": np.array([t.interval_ms for t in trials], dtype=np.float64),
        "rewarded": np.array([bool(t.rewarded) for t in trials], dtype=bool),
        "segment": np.array([t.segment for t in trials], dtype=np.uint32)}
    for name in ("target_ms", "window_low_ms", "window_high_ms"):
        data[name] = np.array([getattr(t, name) for t in trials], dtype=np.float64)
    described = {"start_time": "trial start (the rig's trial_start, else the first press), s",
                 "stop_time": "trial end (the rig's outcome, else the last press, else the press timeout), s"}
    described.update({name: f"{text}{', ' + unit if unit else ''}" for name, unit, text in TRIAL_FIELDS})
    columns = [Column(name, described[name], values) for name, values in data.items()]
    for name in ("outcome", "outcome_source", "computed_outcome", "stage"):
        columns.append(_categorical(name, described[name], [_text(str(getattr(t, name))) for t in trials]))
    return Table("trials", "TimeIntervals", "trials from trial start to trial end; lone presses, premature "
                 "presses and omissions are rows with their outcome", columns, len(trials))


def _spans(conn: sqlite3.Connection, session_id: int, trials: list, events: _Events):
    from monitor.core.session.trial_spans import trial_spans

    text = conn.execute("SELECT protocol_text FROM sessions WHERE id = ?", (session_id,)).fetchone()[0]
    protocol = protocol_of(text) if text else None

    def timeout_us(trial) -> float:
        stage = protocol.stage(trial.stage) if protocol else None
        stage = stage or (protocol.stages[0] if protocol else None)
        return stage.trial_timeout_ms * 1000.0 if stage else 0.0

    return trial_spans(trials, events.times_of("trial_start"), events.times_of("outcome"), timeout_us)


def session_trials(conn: sqlite3.Connection, session_id: int) -> list:
    """The session's stored trials; derived now (not stored) when they were never built."""
    if conn.execute("SELECT 1 FROM trial_builds WHERE session_id = ?", (session_id,)).fetchone():
        return stored_trials(conn, session_id)
    derived = derive(conn, session_id)
    return [] if derived is None else list(derived[0])


def _day_weight_g(conn: sqlite3.Connection, session_id: int, animal_id: int | None, start: datetime) -> float | None:
    row = conn.execute("SELECT weight_before_g FROM checkins WHERE session_id = ?", (session_id,)).fetchone()
    if row and row[0]:
        return float(row[0])
    if animal_id is None:
        return None
    day = start.date().isoformat()
    weights = [(datetime.fromisoformat(at), grams) for at, grams in conn.execute(
        "SELECT at, amount FROM care_log WHERE animal_id = ? AND kind = 'weight' AND substr(at, 1, 10) = ?",
        (animal_id, day))]
    return max(weights)[1] if weights else None


def _subject(record: dict | None, animal: str, start: datetime, weight_g: float | None) -> dict[str, Any]:
    record = record or {}
    birth, age = None, None
    if record.get("date_of_birth"):
        born = date.fromisoformat(record["date_of_birth"])
        birth = datetime.combine(born, clock(0), tzinfo=start.tzinfo)
        age = f"P{(start.date() - born).days}D"
    elif record.get("age_days") is not None:
        stated = date.fromisoformat(record["age_date"]) if record.get("age_date") else start.date()
        days = record["age_days"] + (start.date() - stated).days
        age = f"P{days}D" if days >= 0 else None  # an age stated after the session can put it before birth
    about = [f"{k.replace('_', ' ')} {record[k]}" for k in ("lab_id", "cohort", "supplier") if record.get(k)]
    if record.get("baseline_weight_g"):
        about.append(f"baseline weight {record['baseline_weight_g']:g} g"
                     + (f" on {record['baseline_weight_date']}" if record.get("baseline_weight_date") else ""))
    return {"age": age, "date_of_birth": birth, "description": "; ".join([f"rigside name {animal}", *about]),
            "genotype": record.get("genotype"), "sex": record.get("sex") or "U", "species": record.get("species"),
            "subject_id": subject_label(animal), "weight": f"{weight_g / 1000:g} kg" if weight_g else None,
            "strain": record.get("strain")}


def session_content(conn: sqlite3.Connection, session_id: int, number: int,
                    settings: dict | None = None) -> tuple[str, Content]:
    """Session `session_id` (its animal's `number`-th) as the content of one NWB file, with its animal."""
    settings = settings or {}
    (animal, animal_id, rig, start_wall, label, excluded, reason, name, version, stage) = conn.execute(
        "SELECT animal, animal_id, rig, start_wall, label, excluded, exclusion_reason, protocol_name, "
        "protocol_version, stage FROM sessions WHERE id = ?", (session_id,)).fetchone()
    start = datetime.fromisoformat(start_wall)
    if start.tzinfo is None:
        start = start.astimezone()  # NWB needs an offset: a stored time without one is this PC's local time
    block = session_block(conn, session_id)
    names = event_words(conn)
    events = _Events(block, [names[c] for c in block.code],
                     SessionClock().relative(block.array("t_us"), block.array("segment")))
    shift_us = start_shift_us(conn, session_id, int(block.t_us[0])) if len(block) else 0
    trials = session_trials(conn, session_id)
    operator = conn.execute("SELECT operator FROM checkins WHERE session_id = ?", (session_id,)).fetchone()
    stages = sorted({t.stage for t in trials} | ({stage} if stage else set()))
    flag = f" EXCLUDED: {reason}" if excluded else ""
    described = (f"{animal} in {rig}, session {number}: "
                 f"{f'protocol {name!r} version {version}' if name else 'no protocol'}"
                 f"{', stage ' + ', '.join(stages) if stages else ''}, {len(trials)} trial records{flag}")
    conditions = conditions_of(conn, session_id)
    general: dict[str, Any] = {
        "experimenter": [operator[0]] if operator else None,
        "experiment_description": settings.get("experiment_description") or DEFAULT_EXPERIMENT,
        "institution": settings.get("institution"),
        "keywords": list(settings.get("keywords") or DEFAULT_KEYWORDS),
        "lab": settings.get("lab"),
        "notes": "; ".join(x for x in (f"stored session {session_id}, label {label}" if label else "",
                                       f"excluded: {reason}" if excluded else "") if x) or None,
        "pharmacology": "; ".join(f"{c['what']} {c['dose'] or ''} at {c['at']} by {c['operator']}".replace("  ", " ")
                                  for c in conditions) or None,
        "protocol": f"{name} version {version}" if name else None,
        "session_id": f"{number:03d}"}
    content = Content(
        identifier=str(uuid.uuid5(uuid.NAMESPACE_URL, f"rigside:{animal}:{start_wall}:{session_id}")),
        session_description=_text(described), session_start_time=start,
        general={k: v for k, v in general.items() if v is not None},
        subject=_subject(get_animal(conn, animal), animal, start, _day_weight_g(conn, session_id, animal_id, start)))
    if trials:
        content.trials = _trials_table(trials, _spans(conn, session_id, trials, events), shift_us)
    if len(block):
        content.events.append(_events_table(events, shift_us))
    manipulations = manipulations_table(conn, session_id)
    if manipulations is not None:
        content.processing.append(Module("behavior", BEHAVIOR, [manipulations]))
    return animal, content
