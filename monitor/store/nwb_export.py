"""NWB export: one file per stored session (pynwb, the optional `nwb` extra).

Rule: each session becomes `ANIMAL_sessionID.nwb` with the animal's subject
metadata (subject_id, species, sex, date of birth, genotype, strain; cohort as
the description), the session's start as `session_start_time`, a trials table
with our columns (interval_ms, outcome, rewarded, outcome_source,
computed_outcome, target_ms, window_low_ms, window_high_ms, stage, segment)
and an events table `rig_events` (pynwb.event) with every event's word,
value, clock segment, line and raw device counter. Times are seconds after
`session_start_time` on the device clock: within a session, clock segments
(board resets) continue from the last time seen, the same rule as the trial
segmentation (monitor.core.trials). An excluded session is exported with its
flag and reason in the session description and `notes`. Manipulations in
force get an intervals table (monitor.store.nwb_manipulations).
"""

from __future__ import annotations

import re
import sqlite3
from datetime import datetime
from pathlib import Path
from typing import Callable, Iterable, Iterator

from drivers.wire import Event
from monitor.store.derive import session_events, stored_trials
from monitor.store.nwb_manipulations import add_manipulations

_SAFE = re.compile(r"[^A-Za-z0-9_.-]")
TRIAL_FIELDS = (("interval_ms", "inter-press interval or hold time, ms (NaN when none)"),
                ("outcome", "the rig's outcome word when it sent one, else rigside's classification"),
                ("rewarded", "the trial was rewarded"),
                ("outcome_source", "rig | computed"),
                ("computed_outcome", "rigside's own classification from the protocol"),
                ("target_ms", "target interval in force, ms"),
                ("window_low_ms", "low edge of the reward window in force, ms"),
                ("window_high_ms", "high edge of the reward window in force, ms"),
                ("stage", "shaping stage in force"),
                ("segment", "device clock segment (a board reset starts a new one)"))


def _events_table(events: list[Event], shift_us: int):
    """The `rig_events` table, built column by column (row-by-row adds cost ~100 µs each)."""
    from hdmf.common import VectorData
    from pynwb.event import EventsTable, TimestampVectorData

    times, rows = [], []
    for event, rel in relative_us(events):
        times.append((shift_us + rel) / 1e6)
        rows.append(event)
    columns = [TimestampVectorData(name="timestamp", resolution=1e-6, data=times, description=(
        "seconds after session_start_time on the device clock (clock segments continue from the last time seen)"))]
    for column, description, value in (
            ("event", "event word", lambda e: e.name),
            ("value", "arguments, joined by one space", lambda e: " ".join(e.args)),
            ("segment", "device clock segment", lambda e: e.segment),
            ("line", "line number in the source", lambda e: e.line),
            ("raw_time", "the device counter as sent", lambda e: e.raw_time)):
        columns.append(VectorData(name=column, description=description, data=[value(e) for e in rows]))
    return EventsTable(name="rig_events", description="every event line the rig sent, in order", columns=columns)


def relative_us(events: Iterable[Event]) -> Iterator[tuple[Event, int]]:
    """Each event with its session-relative device time (segments continue from the last time seen)."""
    started, segment, origin, base, last = False, 0, 0, 0, 0
    for event in events:
        if not started or event.segment != segment:
            started, segment, origin, base = True, event.segment, event.t_us, last
        rel = event.t_us - origin + base
        last = max(last, rel)
        yield event, rel


def export_nwb(conn: sqlite3.Connection, out_dir: Path,
               progress: Callable[[int, int, Path], None] | None = None) -> list[Path]:
    """Write one NWB file per session into `out_dir`; return the paths."""
    sessions = conn.execute("SELECT id FROM sessions ORDER BY started_at, id").fetchall()
    out_dir.mkdir(parents=True, exist_ok=True)
    written = []
    for number, (session_id,) in enumerate(sessions, start=1):
        path = write_session(conn, session_id, out_dir)
        written.append(path)
        if progress is not None:
            progress(number, len(sessions), path)
    return written


def _subject(conn: sqlite3.Connection, animal: str):
    from pynwb.file import Subject

    row = conn.execute("SELECT cohort, species, strain, sex, date_of_birth, genotype FROM animals WHERE name = ?",
                       (animal,)).fetchone()
    cohort, species, strain, sex, born, genotype = row if row else (None,) * 6
    birth = None
    if born:
        birth = datetime.fromisoformat(born)
        birth = birth.astimezone() if birth.tzinfo is None else birth
    return Subject(subject_id=animal, species=species, strain=strain, sex=sex or "U", date_of_birth=birth,
                   genotype=genotype, description=f"cohort {cohort}" if cohort else None)


def write_session(conn: sqlite3.Connection, session_id: int, out_dir: Path) -> Path:
    from pynwb import NWBHDF5IO, NWBFile

    animal, rig, start_wall, label, excluded, reason, name, version, start_us = conn.execute(
        "SELECT animal, rig, start_wall, label, excluded, exclusion_reason, protocol_name, protocol_version, "
        "start_device_us FROM sessions WHERE id = ?", (session_id,)).fetchone()
    start = datetime.fromisoformat(start_wall)
    events = list(session_events(conn, session_id))
    shift_us = events[0].t_us - start_us if events and start_us is not None else 0
    flag = f" EXCLUDED: {reason}" if excluded else ""
    nwb = NWBFile(
        session_description=f"{animal} in {rig}, protocol {name!r} version {version}{flag}",
        identifier=f"rigside-{animal}-{session_id}-{start.isoformat()}",
        session_start_time=start,
        session_id=label or str(session_id),
        subject=_subject(conn, animal),
        notes=f"excluded: {reason}" if excluded else None,
    )
    for column, description in TRIAL_FIELDS:
        nwb.add_trial_column(name=column, description=description)
    for t in stored_trials(conn, session_id):
        begin = (shift_us + t.t_us) / 1e6
        length = t.interval_ms / 1000 if t.interval_ms == t.interval_ms else 0.0
        nwb.add_trial(start_time=begin, stop_time=begin + length, interval_ms=t.interval_ms, outcome=t.outcome,
                      rewarded=t.rewarded, outcome_source=t.outcome_source, computed_outcome=t.computed_outcome,
                      target_ms=t.target_ms, window_low_ms=t.window_low_ms, window_high_ms=t.window_high_ms,
                      stage=t.stage, segment=t.segment)
    if events:
        nwb.add_events_table(_events_table(events, shift_us))
    add_manipulations(nwb, conn, session_id)
    path = out_dir / f"{_SAFE.sub('_', animal)}_session{session_id}.nwb"
    with NWBHDF5IO(str(path), "w") as io:
        io.write(nwb)
    return path
