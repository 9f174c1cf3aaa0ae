"""NWB export: one file per stored session (pynwb, the optional `nwb` extra).

Rule: each session becomes `sub-<animal>_ses-<NNN>_behavior.nwb` (NNN: the
animal's own session count in time order, also the `session_id`; the animal's
name with every character outside letters, digits and `-` made `-`), written
under a temporary name and renamed when complete, so a file of that name is
always whole. Subject: the animal's record (monitor.store.animals: species,
sex, date of birth and age at the session, strain, genotype; lab id, cohort
and supplier in its description) and its weight on the session's day (the
check-in weight, else the care log's last weighing of that day). Session:
experimenter (the operator who checked it in), description, institution, lab,
keywords and experiment description (the settings' `[export]` table),
protocol name and version, stage and conditions. Trials run from trial start
to trial end (monitor.core.session.trial_spans) with our TRIAL_FIELDS; the events
table `rig_events` holds every event with its word as a categorical column.
Times are seconds after `session_start_time` on the device clock (segments
continue from the last time seen, as in monitor.core.session.trials). Every column is
gzip-compressed. NUL in a note is written as the text `\\x00` (HDF5 strings
cannot hold it). One failed session is reported and the others are written.
"""

from __future__ import annotations

import os
import re
import sqlite3
import uuid
import warnings
from dataclasses import dataclass, field
from datetime import date, datetime, time as clock
from pathlib import Path
from typing import Any, Callable, Iterable

import numpy as np

from drivers.wire import Event
from monitor.store.animals import get_animal, missing_fields
from monitor.store.derive import derive, protocol_of, session_events, stored_trials
from monitor.store.records import conditions_of
from monitor.store.session_time import relative_us, start_shift_us
from monitor.store.nwb_manipulations import add_manipulations

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
HDF5_FORMAT = "v110"  # object headers of HDF5 1.10 (readable by 1.10 and later): smaller than the earliest format
DEFAULT_KEYWORDS = ("behavior", "operant conditioning", "motor timing", "motor skill learning")
DEFAULT_EXPERIMENT = ("Operant training of a motor timing task (two lever presses a target delay apart, or a "
                      "joystick push held for a target time), recorded from the box's event stream by rigside.")


@dataclass
class ExportResult:
    """What an export wrote, what it could not, and what it warns about (one line each)."""

    written: list[Path] = field(default_factory=list)
    failed: list[str] = field(default_factory=list)
    warnings: list[str] = field(default_factory=list)


def file_name(animal: str, number: int) -> str:
    """The session's file name in the repository layout."""
    return f"sub-{subject_label(animal)}_ses-{number:03d}_behavior.nwb"


def subject_label(animal: str) -> str:
    return _ID.sub("-", animal) or "unnamed"


def _gz(data: Any):
    from hdmf.backends.hdf5 import H5DataIO

    return H5DataIO(data, compression="gzip", shuffle=True)


def _ids(n: int):
    from hdmf.common import ElementIdentifiers

    return ElementIdentifiers(name="id", data=_gz(np.arange(n, dtype=np.int64)))


def _narrow(values: np.ndarray) -> np.ndarray:
    """The same integers in the smallest unsigned type that holds them (they compress better)."""
    if len(values) and values.min() >= 0:
        for dtype in (np.uint8, np.uint16, np.uint32):
            if values.max() <= np.iinfo(dtype).max:
                return values.astype(dtype)
    return values


def _text(value: str) -> str:
    return value.replace("\x00", "\\x00")


def _categorical(name: str, description: str, values: list[str]):
    """An EnumData column: one small code per row, each distinct text stored once."""
    from hdmf.common import EnumData, VectorData

    words = sorted(set(values))
    index = {w: i for i, w in enumerate(words)}
    dtype = np.uint8 if len(words) <= 256 else np.uint16 if len(words) <= 65536 else np.uint32
    elements = VectorData(name=f"{name}_elements", description=f"the distinct values of {name}", data=words)
    column = EnumData(name=name, description=description, elements=elements,
                      data=_gz(np.fromiter((index[v] for v in values), dtype=dtype, count=len(values))))
    return column, elements


def _events_table(timed: list[tuple[Event, int]], shift_us: int):
    """The `rig_events` table, built column by column."""
    from hdmf.common import VectorData
    from pynwb.event import EventsTable, TimestampVectorData

    n = len(timed)
    times = np.fromiter(((shift_us + rel) / 1e6 for _, rel in timed), dtype=np.float64, count=n)
    rows = [e for e, _ in timed]
    event, event_words = _categorical("event", "event word", [e.name for e in rows])
    value, value_texts = _categorical("value", "arguments, joined by one space (empty when none)",
                                      [_text(" ".join(e.args)) for e in rows])
    columns = [TimestampVectorData(name="timestamp", resolution=1e-6, data=_gz(times), description=(
        "seconds after session_start_time on the device clock (clock segments continue from the last time seen)")),
        event, event_words, value, value_texts]
    for name, description, get in (
            ("segment", "device clock segment", lambda e: e.segment),
            ("line", "line number in the source", lambda e: e.line),
            ("raw_time", "the device counter as sent", lambda e: e.raw_time)):
        values = np.fromiter((get(e) for e in rows), dtype=np.int64, count=n)
        columns.append(VectorData(name=name, description=description, data=_gz(_narrow(values))))
    return EventsTable(name="rig_events", description="every event line the rig sent, in order", columns=columns,
                       id=_ids(n))


def _trials_table(trials: list, spans: list[tuple[int, int]], shift_us: int):
    from hdmf.common import VectorData
    from pynwb.epoch import TimeIntervals

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
    columns = [VectorData(name=name, description=described[name], data=_gz(values)) for name, values in data.items()]
    for name in ("outcome", "outcome_source", "computed_outcome", "stage"):
        columns.extend(_categorical(name, described[name], [_text(str(getattr(t, name))) for t in trials]))
    return TimeIntervals(name="trials", description="trials from trial start to trial end; lone presses, premature "
                         "presses and omissions are rows with their outcome", columns=columns, id=_ids(len(trials)))


def _spans(conn: sqlite3.Connection, session_id: int, trials: list, timed: list[tuple[Event, int]]):
    from monitor.core.session.trial_spans import trial_spans

    text = conn.execute("SELECT protocol_text FROM sessions WHERE id = ?", (session_id,)).fetchone()[0]
    protocol = protocol_of(text) if text else None

    def timeout_us(trial) -> float:
        stage = protocol.stage(trial.stage) if protocol else None
        stage = stage or (protocol.stages[0] if protocol else None)
        return stage.trial_timeout_ms * 1000.0 if stage else 0.0

    starts = sorted(rel for e, rel in timed if e.name == "trial_start")
    outcomes = sorted(rel for e, rel in timed if e.name == "outcome")
    return trial_spans(trials, starts, outcomes, timeout_us)


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


def _subject(record: dict | None, animal: str, start: datetime, weight_g: float | None):
    from pynwb.file import Subject

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
    return Subject(subject_id=subject_label(animal), species=record.get("species"), strain=record.get("strain"),
                   sex=record.get("sex") or "U", date_of_birth=birth, age=age, genotype=record.get("genotype"),
                   weight=f"{weight_g / 1000:g} kg" if weight_g else None,
                   description="; ".join([f"rigside name {animal}", *about]))


def write_session(conn: sqlite3.Connection, session_id: int, number: int, out_dir: Path,
                  settings: dict | None = None) -> Path:
    """Write session `session_id` (the animal's `number`-th) into `out_dir`; return the file's path."""
    import h5py
    from pynwb import NWBHDF5IO, NWBFile

    settings = settings or {}
    (animal, animal_id, rig, start_wall, label, excluded, reason, name, version, stage) = conn.execute(
        "SELECT animal, animal_id, rig, start_wall, label, excluded, exclusion_reason, protocol_name, "
        "protocol_version, stage FROM sessions WHERE id = ?", (session_id,)).fetchone()
    start = datetime.fromisoformat(start_wall)
    timed = list(relative_us(session_events(conn, session_id)))
    shift_us = start_shift_us(conn, session_id, timed[0][0].t_us) if timed else 0
    trials = session_trials(conn, session_id)
    operator = conn.execute("SELECT operator FROM checkins WHERE session_id = ?", (session_id,)).fetchone()
    stages = sorted({t.stage for t in trials} | ({stage} if stage else set()))
    flag = f" EXCLUDED: {reason}" if excluded else ""
    described = (f"{animal} in {rig}, session {number}: "
                 f"{f'protocol {name!r} version {version}' if name else 'no protocol'}"
                 f"{', stage ' + ', '.join(stages) if stages else ''}, {len(trials)} trial records{flag}")
    conditions = conditions_of(conn, session_id)
    nwb = NWBFile(
        session_description=_text(described),
        identifier=str(uuid.uuid5(uuid.NAMESPACE_URL, f"rigside:{animal}:{start_wall}:{session_id}")),
        session_start_time=start,
        session_id=f"{number:03d}",
        subject=_subject(get_animal(conn, animal), animal, start, _day_weight_g(conn, session_id, animal_id, start)),
        experimenter=[operator[0]] if operator else None,
        experiment_description=settings.get("experiment_description") or DEFAULT_EXPERIMENT,
        institution=settings.get("institution"),
        lab=settings.get("lab"),
        keywords=list(settings.get("keywords") or DEFAULT_KEYWORDS),
        protocol=f"{name} version {version}" if name else None,
        pharmacology="; ".join(f"{c['what']} {c['dose'] or ''} at {c['at']} by {c['operator']}".replace("  ", " ")
                               for c in conditions) or None,
        notes="; ".join(x for x in (f"stored session {session_id}, label {label}" if label else "",
                                    f"excluded: {reason}" if excluded else "") if x) or None,
    )
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message="EnumData is experimental")
        if trials:
            nwb.trials = _trials_table(trials, _spans(conn, session_id, trials, timed), shift_us)
        if timed:
            nwb.add_events_table(_events_table(timed, shift_us))
        add_manipulations(nwb, conn, session_id)
        path = out_dir / file_name(animal, number)
        part = path.with_name(f".{path.stem}.partial.nwb")
        try:
            with h5py.File(part, "w", libver=HDF5_FORMAT) as file, NWBHDF5IO(file=file, mode="w") as io:
                io.write(nwb)
            os.replace(part, path)
        finally:
            part.unlink(missing_ok=True)
    return path


def export_nwb(conn: sqlite3.Connection, out_dir: Path, settings: dict | None = None,
               progress: Callable[[int, int, Path], None] | None = None) -> ExportResult:
    """Write one NWB file per session into `out_dir`; a failed session is listed and the rest written."""
    sessions = conn.execute("SELECT id, animal FROM sessions ORDER BY animal, started_at, id").fetchall()
    out_dir.mkdir(parents=True, exist_ok=True)
    result = ExportResult()
    counts: dict[str, int] = {}
    for animal in sorted({a for _, a in sessions}):
        missing = missing_fields(get_animal(conn, animal))
        if missing:
            result.warnings.append(f"{animal}: subject record lacks {', '.join(missing)} "
                                   f"(exported without; add with `rigside animal edit {animal} ...`)")
    labels: dict[str, str] = {}
    for done, (session_id, animal) in enumerate(sessions, start=1):
        counts[animal] = counts.get(animal, 0) + 1
        first = labels.setdefault(subject_label(animal), animal)
        if first != animal:
            result.failed.append(f"{animal} session {counts[animal]} (its file name would be {first}'s: "
                                 f"sub-{subject_label(animal)}; rename one of them)")
            continue
        try:
            path = write_session(conn, session_id, counts[animal], out_dir, settings)
        except Exception as exc:  # noqa: BLE001 - one session's fault must not stop the others
            result.failed.append(f"{animal} session {counts[animal]} ({type(exc).__name__}: "
                                 f"{str(exc).splitlines()[0] if str(exc) else ''})")
            continue
        result.written.append(path)
        if progress is not None:
            progress(done, len(sessions), path)
    return result

