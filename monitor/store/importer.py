"""Importing recorded files: wire-format sessions and a lab's mapped history files.

Rule: a file is imported once: its SHA-256 is stored in `imports` in the same
transaction as its sessions, events, raw lines and trials, so a crash leaves
all of the file or none, and the same bytes (under any name) are refused
afterwards, as are other bytes that hold sessions stored already (the same
animal, start and events: `stored_before`); so is a log file whose beginning was recorded live
(`recorded_live`). A file whose beginning was imported earlier under the same
name (imported while still being written: `grown_from`) is stored whole and the
earlier import's sessions are excluded as superseded (`supersede`) in its
transaction, so no event counts twice; the other way round, a file whose
beginning was imported is recorded live from after the imported bytes
(`imported_start`). Every record is kept: events in `events`, malformed lines,
headers and comments in `raw_lines` with their position. Sessions
(docs/store.md, "Sessions"): a mapped file's `session` column, when it has
one, names them; otherwise a `session_end` closes the running session, a
`session_start` after presses opens a new one, and so does a pause longer than
`gap_s` (by wall time when both events have one — a wrapping counter cannot
measure a long pause — else by device time within a clock segment). The
animal is the mapping's `animal` column, else `--animal`, else the file name
`NAME_sNN.ext`. A session starts at its first record's wall time: the
header's `start=` (+ device time when it begins inside a segment) or the
mapped wall-time column; without either, the file's modification time, and a
notice row says so. The trials of each session are derived as it is stored.
Records become rows through monitor.store.rows, as in the live writer;
`parse_file` does all of that without the database, `store_parsed` only
inserts what it made, and `commit_file` does that and the superseding in a
transaction of its own (the importing process, or the worker processes that
store files side by side).
"""

from __future__ import annotations

import hashlib
import io
import os
import re
import sqlite3
import time
from dataclasses import dataclass, field
from datetime import datetime, timedelta, timezone
from pathlib import Path
from typing import Any, Callable

from drivers.status import FilePosition
from drivers.wire import Event, Header, Malformed, Record, WireDecoder
from monitor.store.derive import derive_events, store_trials, trial_row
from monitor.store.registry import ensure_animal, ensure_protocol
from monitor.store.rows import EVENT_COLUMNS, Codes, insert_rows, recode, session_rows
from monitor.store.schema import KNOWN_EVENT_CODES

GAP_S = 2 * 3600.0  # a pause longer than this between two events of one animal starts a new session
PRESSES = frozenset({"lever_down", "lever_up", "joystick", "trial_start", "outcome"})
_FILE_ANIMAL = re.compile(r"^(?P<animal>.+?)_s\d+$")
_EPOCH = datetime(1970, 1, 1, tzinfo=timezone.utc)


_CONTENT = slice(EVENT_COLUMNS.index("t_us"), None)  # an event row without its segment and line numbers


class ImportRefused(Exception):
    """The file cannot be imported as asked; the message says why in one line."""


class AlreadyImported(ImportRefused):
    """The same bytes were imported before (perhaps by another process a moment ago)."""

    meanwhile = "imported meanwhile by another process"


class RecordedMeanwhile(AlreadyImported):
    """A recorder follows the file live into this store now (its source lock): importing it would store its
    events twice."""

    meanwhile = "recorded live meanwhile"


class StoredAlready(AlreadyImported):
    """The file's sessions are stored already from other bytes: the same animal, start and events (a copy
    whose line endings were changed on the way, say)."""

    meanwhile = "stored already from other bytes (the same animal, start and events: a copy re-saved on the way?)"


def stored_before(conn: sqlite3.Connection, parsed: ParsedFile, remap: dict[int, int]) -> list[Grown]:
    """The file's sessions against the stored ones (not excluded) of the same animal that start at the same
    moment, by content (device time, counter, event, arguments, wall time): bytes differ where content does
    not (CRLF line endings from a copy or an editor), so the file's digest alone would store events twice.
    Raises StoredAlready when a stored session's events begin with exactly a session of the file (the same
    session, or the file cut short); returns the imported sessions whose events are a proper beginning of a
    session of the file (it grew since, and came by other bytes): the caller supersedes them."""
    twins: list[str] = []
    grown: list[Grown] = []
    for session in parsed.sessions:
        events: list[tuple] | None = None  # made only for a session that has a stored one to compare with
        for session_id, label, earlier, imported_at, first, last in conn.execute(
                "SELECT s.id, s.label, coalesce(i.path, 'recorded live'), i.imported_at, s.first_event, s.last_event "
                "FROM sessions AS s JOIN animals AS a ON a.id = s.animal_id "
                "LEFT JOIN imports AS i ON i.id = s.import_id "
                "WHERE a.name = ? AND s.started_at = ? AND s.excluded = 0 ORDER BY s.id",
                (session.animal, session.start.timestamp())).fetchall():
            if events is None:
                events = [row[_CONTENT] for row in recode(session.events, remap)]
            where, args = "session_id = ?", [session_id]
            if first is not None and last is not None:
                where, args = "rowid BETWEEN ? AND ? AND session_id = ?", [first, last, session_id]
            stored = conn.execute(f"SELECT t_us, raw_time, code, value, wall FROM events WHERE {where} "
                                  "ORDER BY rowid LIMIT ?", [*args, len(events) + 1]).fetchall()
            if stored[: len(events)] == events:
                twins.append(f"{label} ({earlier})")
                break
            if imported_at is not None and stored == events[: len(stored)]:
                grown.append(Grown(imported_at, (session_id,)))
    if twins:
        named = ", ".join(twins[:3]) + (", ..." if len(twins) > 3 else "")
        raise StoredAlready(f"{parsed.path}: {len(twins)} of its {len(parsed.sessions)} sessions are stored already "
                            f"from other bytes: {named}, the same animal, start and events (a copy whose line "
                            "endings changed?); importing it would store their events twice; nothing was changed")
    return grown


def refuse_if_recording(conn: sqlite3.Connection, path: Path) -> None:
    """Raise RecordedMeanwhile when a recorder (`rigside record`, the window) follows `path` into this store
    now; it then stores the file's events itself (after any imported bytes: `imported_start`)."""
    from monitor.store.source_locks import holder_of, resource_key

    busy = holder_of(conn, resource_key("file", str(path)))
    if busy is not None:
        raise RecordedMeanwhile(f"{path}: {busy}: importing it would store its events twice; nothing was changed")


class Abandoned(Exception):
    """A file the import stopped storing: not begun, or rolled back before its commit."""


@dataclass
class _Session:
    animal: str
    label: str
    start: datetime | None = None
    rig: str | None = None
    start_device_us: int | None = None  # device µs at `start`
    records: list[Record] = field(default_factory=list)
    events: int = 0
    malformed: int = 0
    pressed: bool = False
    ended: bool = False
    last_segment: int | None = None  # clock segment and device µs of the last event
    last_t_us: int = 0
    last_wall_us: int | None = None  # wall time of the last event that has one, µs since the epoch


@dataclass(frozen=True)
class Imported:
    """What one file gave."""

    path: str
    sessions: int
    events: int
    malformed: int
    trials: int
    labels: tuple[str, ...]
    notices: tuple[str, ...]
    animals: tuple[str, ...]
    grown: tuple[Grown, ...] = ()  # imported sessions this file holds grown, by content (`stored_before`)


def file_digest(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


def already_imported(conn: sqlite3.Connection, digest: str) -> tuple[str, float] | None:
    """(path, imported_at) of an earlier import of the same bytes, or None."""
    row = conn.execute("SELECT path, imported_at FROM imports WHERE sha256 = ?", (digest,)).fetchone()
    return None if row is None else (row[0], row[1])


def animals_imported_from(conn: sqlite3.Connection, digest: str) -> list[str]:
    """The animals of the sessions stored from an earlier import of the same bytes, by name."""
    rows = conn.execute("SELECT DISTINCT s.animal FROM sessions AS s JOIN imports AS i ON i.id = s.import_id "
                        "WHERE i.sha256 = ? ORDER BY s.animal", (digest,))
    return [row[0] for row in rows]


@dataclass(frozen=True)
class Grown:
    """An earlier import of a file that has grown since (imported while it was still being written)."""

    imported_at: float
    sessions: tuple[int, ...]  # its sessions not excluded yet


def _imported_beginnings(conn: sqlite3.Connection, name: str, read: Callable[[int], bytes], size: int,
                         whole: bool) -> list[tuple[int, float, int, int]]:
    """(import id, imported at, size, events) of the earlier imports of a file named `name` whose bytes are the
    beginning of the `size` bytes that `read` gives in turn (an import of all of them too when `whole`),
    shortest first: one pass, however many earlier files share the name."""
    found = []
    head, hashed = hashlib.sha256(), 0
    for import_id, earlier, imported_at, stored, digest, events in conn.execute(
            f"SELECT id, path, imported_at, size, sha256, events FROM imports WHERE size {'<=' if whole else '<'} ? "
            "AND substr(path, -?) = ? ORDER BY size, id", (size, len(name), name)).fetchall():
        head.update(read(stored - hashed))
        hashed = stored
        if re.split(r"[\\/]", earlier)[-1] == name and head.copy().hexdigest() == digest:
            found.append((import_id, imported_at, stored, events))
    return found


def grown_from(conn: sqlite3.Connection, path: Path, data: bytes) -> list[Grown]:
    """Earlier imports of a file of the same name whose bytes are the beginning of `data`: the file grew
    after they were imported. Importing it whole stores their events a second time, so the caller
    supersedes them (`supersede`) in the same transaction."""
    found = []
    for import_id, imported_at, _, _ in _imported_beginnings(conn, path.name, io.BytesIO(data).read, len(data),
                                                             whole=False):
        sessions = tuple(row[0] for row in conn.execute(
            "SELECT id FROM sessions WHERE import_id = ? AND excluded = 0 ORDER BY id", (import_id,)))
        found.append(Grown(imported_at, sessions))
    return found


def supersede(conn: sqlite3.Connection, grown: list[Grown], path: Path, operator: str) -> int:
    """Exclude the sessions of the earlier imports of `path` (each exclusion logged, in the caller's
    transaction, which also stores the whole file); how many."""
    from monitor.store.session_changes import set_excluded

    count = 0
    for earlier in grown:
        when = datetime.fromtimestamp(earlier.imported_at).astimezone().isoformat(timespec="seconds")
        for session_id in earlier.sessions:
            set_excluded(conn, session_id, True, operator=operator,
                         reason=f"superseded: {path.name} was imported at {when} while still being written; "
                                "the whole file was imported again")
            count += 1
    return count


@dataclass(frozen=True)
class ImportedStart:
    """Where live recording of a file goes on because its beginning was imported (while still being
    written): after the imported bytes, so that none of their events is stored twice."""

    position: FilePosition
    imported_bytes: int
    imported_at: float
    events: int

    def notice(self, path: str) -> str:
        when = datetime.fromtimestamp(self.imported_at).astimezone().isoformat(timespec="seconds")
        return (f"{Path(path).name}: its first {self.imported_bytes} bytes ({self.events} events) were imported "
                f"at {when}: following it from byte {self.position.offset}")


def imported_start(conn: sqlite3.Connection, path: str, decoder_factory: Callable[[], Any]) -> ImportedStart | None:
    """For a file source never read live: the longest earlier import of a file of the same name whose bytes
    are the beginning of the file now, and where to follow the file after them (`drivers.tail.position_after`;
    an import is a whole read, so its events are stored already); None when there is none, or the file cannot
    be read now (the reader then waits for it as for any file)."""
    from drivers.tail import position_after

    try:
        with open(path, "rb") as fh:
            found = _imported_beginnings(conn, Path(path).name, fh.read, os.fstat(fh.fileno()).st_size, whole=True)
        if not found:
            return None
        _, imported_at, stored, events = found[-1]
        position = position_after(path, stored, decoder_factory)
    except OSError:
        return None
    return None if position is None else ImportedStart(position, stored, imported_at, events)


@dataclass(frozen=True)
class RecordedLive:
    """A log file that `rigside record` (or the window) followed live: its bytes are stored already."""

    source: str  # the recorded source's path, as configured
    rig: str | None
    recorded_bytes: int  # how far the recording got
    sessions: tuple[int, ...]
    animals: tuple[str, ...]


def recorded_live(conn: sqlite3.Connection, data: bytes) -> RecordedLive | None:
    """The file source recorded live whose recorded bytes are the beginning of `data` (the same log file, or
    a copy: recognised by the recorder's own fingerprint of its first bytes and of those before where it
    stopped), or None. Importing such a file would store its recorded events a second time."""
    from drivers.tail import file_fingerprint

    for source_id, path, rig, offset, expected, span in conn.execute(
            "SELECT s.id, s.path, s.rig, f.byte_offset, f.fingerprint, f.prefix_len FROM sources AS s "
            "JOIN file_offsets AS f ON f.source_id = s.id WHERE s.kind = 'file' AND f.byte_offset BETWEEN 1 AND ? "
            "ORDER BY s.id", (len(data),)).fetchall():
        if file_fingerprint(io.BytesIO(data), offset, span)[0] == expected:
            rows = conn.execute("SELECT id, animal FROM sessions WHERE source_id = ? ORDER BY id",
                                (source_id,)).fetchall()
            return RecordedLive(path, rig, offset, tuple(r[0] for r in rows),
                                tuple(sorted({r[1] for r in rows if r[1] is not None})))
    return None


def animal_from_file_name(path: Path) -> str | None:
    """`alder_s03.rsw` -> `alder` (mock_rig's and many labs' naming), else None."""
    match = _FILE_ANIMAL.match(path.stem)
    return match.group("animal") if match else None


class _Splitter:
    """Cuts one file's records into sessions per animal (the module rule)."""

    def __init__(self, path: Path, animal: str | None, gap_s: float, mapped: bool, has_session: bool) -> None:
        self.path, self.animal, self.gap_s = path, animal, gap_s
        self.mapped, self.has_session = mapped, has_session
        self.sessions: list[_Session] = []
        self.current: dict[tuple[str, str | None], _Session] = {}
        self.last: _Session | None = None
        self.segment_start: dict[int, datetime] = {}
        self.segment_start_us: dict[int, int] = {}  # the same, µs since the epoch (cheap per event)
        self.segment_rig: dict[int, str] = {}
        self.pending: list[Record] = []  # records before any session exists
        self.begun: set[int] = set()  # segments whose first event has been seen
        self.notices: list[str] = []

    def _animal_of(self, event: Event) -> str:
        name = event.animal or self.animal
        if name is None:
            raise ImportRefused(f"{self.path}: the file does not say which animal (no animal column, and the "
                                "name is not NAME_sNN): give --animal")
        return name

    def _moment(self, event: Event, first: bool) -> datetime | None:
        """The event's wall time with its offset: mapped, the header's start= (a segment's first event), or
        start= plus its device time."""
        if event.wall_time:
            return datetime.fromisoformat(event.wall_time)
        start = self.segment_start.get(event.segment)
        return start if start is None or first else start + timedelta(microseconds=event.t_us)

    def _new(self, key: tuple[str, str | None], event: Event, first: bool, origin: int) -> _Session:
        label = key[1] if key[1] is not None else f"{self.path.name}#{sum(s.animal == key[0] for s in self.sessions) + 1}"
        session = _Session(key[0], label, self._moment(event, first), self.segment_rig.get(event.segment), origin)
        if not self.sessions and self.pending:
            session.records.extend(self.pending)
            session.malformed += sum(type(r) is Malformed for r in self.pending)
            self.pending.clear()
        self.sessions.append(session)
        self.current[key] = session
        return session

    def _starts_new(self, session: _Session, event: Event, wall_us: int | None) -> bool:
        if self.has_session:
            return False
        if session.ended:
            return True
        if event.name == "session_start" and session.pressed:
            return True
        if wall_us is not None and session.last_wall_us is not None:  # a wrapping counter cannot measure long pauses
            return (wall_us - session.last_wall_us) / 1e6 > self.gap_s
        if session.last_segment == event.segment:
            return (event.t_us - session.last_t_us) / 1e6 > self.gap_s
        return False

    def add(self, record: Record) -> None:
        if type(record) is Header:
            start = record.fields.get("start")
            if start is not None:
                try:
                    stamp = datetime.fromisoformat(start)
                except ValueError:
                    stamp = None
                if stamp is not None and stamp.tzinfo is not None:
                    self.segment_start[record.segment] = stamp
                    self.segment_start_us[record.segment] = _epoch_us(stamp)
                else:
                    self.notices.append(f"line {record.line}: header start={start!r} is not ISO 8601 with an "
                                        "offset; ignored")
            if "rig" in record.fields:
                self.segment_rig[record.segment] = record.fields["rig"]
        if type(record) is not Event:
            target = self.last
            if target is None:
                self.pending.append(record)
            else:
                target.records.append(record)
                target.malformed += type(record) is Malformed
            return
        t_us, name, _, _, segment, _, _, _, wall_time, animal, label = record  # one unpacking: hot path
        key = (animal or self._animal_of(record), label)
        origin, first = t_us, False
        if wall_time:
            wall_us: int | None = _epoch_us(datetime.fromisoformat(wall_time))
        else:
            start = self.segment_start_us.get(segment)
            wall_us = None if start is None else start + origin
            if segment not in self.begun:
                self.begun.add(segment)
                if start is not None:  # a segment's first event: the header's start=
                    wall_us, origin, first = start, 0, True
        session = self.current.get(key)
        if session is None or self._starts_new(session, record, wall_us):
            session = self._new(key, record, first, origin)
            if self.last is not None and self.last is not session and not self.mapped:
                # headers and comments just before the session's first event belong to it
                moved = _trailing_non_events(self.last.records)
                if moved:
                    del self.last.records[-len(moved):]
                    self.last.malformed -= sum(type(r) is Malformed for r in moved)
                    session.records[:0] = moved
                    session.malformed += sum(type(r) is Malformed for r in moved)
        session.records.append(record)
        session.events += 1
        if name in PRESSES:
            session.pressed = True
        elif name == "session_end":
            session.ended = True
        session.last_segment, session.last_t_us = segment, t_us
        if wall_us is not None:
            session.last_wall_us = wall_us
        self.last = session

    def finish(self, fallback: datetime) -> list[_Session]:
        if self.pending:  # a file with no events at all: keep its lines in one empty session
            session = _Session(self.animal or self.path.stem, f"{self.path.name}#1")
            session.records, session.malformed = list(self.pending), sum(type(r) is Malformed for r in self.pending)
            self.sessions.append(session)
        for session in self.sessions:
            if session.start is None:
                session.start = fallback
                self.notices.append(f"{session.label}: no wall-clock time in the file; the session start is the "
                                    f"file's modification time {fallback.isoformat(timespec='seconds')}")
        return self.sessions


def _epoch_us(moment: datetime) -> int:
    """An aware datetime as whole µs since the epoch (exact: differences equal the datetimes')."""
    return (moment - _EPOCH) // timedelta(microseconds=1)


def _trailing_non_events(records: list[Record]) -> list[Record]:
    out: list[Record] = []
    for record in reversed(records):
        if type(record) is Event:
            break
        out.append(record)
    out.reverse()
    return out


@dataclass
class ParsedSession:
    """One session of a file, parsed and derived, ready to store (plain data: it crosses processes)."""

    animal: str
    label: str
    start: datetime
    rig: str | None
    start_device_us: int | None
    ended_at: float | None
    events: list[tuple]  # event rows (monitor.store.rows), codes from the file's `codes`
    raw: list[tuple]  # raw-line rows
    malformed: int
    trial_rows: list[tuple] | None  # derive.trial_row values; None without a protocol
    counts: dict[str, int]
    water_ul: float | None


@dataclass
class ParsedFile:
    """One file's sessions and notices; `store_parsed` puts it in the store."""

    path: str
    digest: str
    size: int
    mapped: bool
    sessions: list[ParsedSession]
    notices: list[str]
    codes: Codes  # the store's codes when parsed, and provisional ones for words it had none for


def parse_file(path: Path, data: bytes, *, protocol_text: str, animal: str | None = None, mapping: Any = None,
               gap_s: float = GAP_S, calibrations: dict[str, float] | None = None,
               codes: dict[str, int] | None = None) -> ParsedFile:
    """Decode, split into sessions, make the rows and derive the trials of one file, without the database.

    `calibrations` maps rig names to valve µL per ms (the store's rigs), for water from `valve` events;
    `codes` maps event words to the store's codes (`event_codes`; default: the known words only)."""
    if mapping is None:
        decoder: Any = WireDecoder()
    else:
        from drivers.mapping import MappedDecoder

        decoder = MappedDecoder(mapping)
    has_session = mapping is not None and "session" in mapping.columns
    animal = animal if animal is not None or mapping is not None and "animal" in mapping.columns \
        else animal_from_file_name(path)
    splitter = _Splitter(path, animal, gap_s, mapping is not None, has_session)
    for record in decoder.feed(data) + decoder.close():
        splitter.add(record)
    mtime = datetime.fromtimestamp(path.stat().st_mtime).astimezone() if path.exists() else datetime.now().astimezone()
    table = Codes(KNOWN_EVENT_CODES if codes is None else codes)
    sessions = []
    for session in splitter.finish(mtime):
        sessions.append(_parse_session(session, protocol_text, (calibrations or {}).get(session.rig or "import"),
                                       table))
        session.records.clear()  # its rows are made: a file's decoded records are not all held at once
    return ParsedFile(str(path), file_digest(data), len(data), mapping is not None, sessions, splitter.notices,
                      table)


def _parse_session(session: _Session, protocol_text: str, valve_ul_per_ms: float | None,
                   codes: Codes) -> ParsedSession:
    assert session.start is not None
    events, raw = session_rows(session.records, codes)
    trial_rows, counts, water = None, {"no_protocol": 1}, None
    if protocol_text:  # imported sessions start with no stage: the protocol's own default
        trials, counts, water = derive_events(protocol_text, None, valve_ul_per_ms,
                                              (r for r in session.records if type(r) is Event))
        trial_rows = [trial_row(t) for t in trials]
    ended = session.last_wall_us / 1e6 if session.last_wall_us is not None else None
    return ParsedSession(session.animal, session.label, session.start, session.rig, session.start_device_us, ended,
                         events, raw, session.malformed, trial_rows, counts, water)


def import_file(conn: sqlite3.Connection, path: Path, data: bytes, *, protocol_text: str, protocol_name: str,
                protocol_version: int, animal: str | None = None, mapping: Any = None,
                mapping_text: str | None = None, gap_s: float = GAP_S) -> Imported:
    """Store one file's sessions in the caller's transaction (BEGIN IMMEDIATE); see the module rule."""
    refuse_if_imported(conn, path, file_digest(data))
    parsed = parse_file(path, data, protocol_text=protocol_text, animal=animal, mapping=mapping, gap_s=gap_s,
                        calibrations=rig_calibrations(conn), codes=event_codes(conn))
    return store_parsed(conn, parsed, protocol_text=protocol_text, protocol_name=protocol_name,
                        protocol_version=protocol_version, mapping_text=mapping_text)


def refuse_if_imported(conn: sqlite3.Connection, path: Path, digest: str) -> None:
    """Raise AlreadyImported when the same bytes were imported before."""
    earlier = already_imported(conn, digest)
    if earlier is not None:
        when = datetime.fromtimestamp(earlier[1]).astimezone().isoformat(timespec="seconds")
        raise AlreadyImported(f"{path}: already imported (same content as {earlier[0]}, imported {when}); "
                              "nothing was changed")


def event_codes(conn: sqlite3.Connection) -> dict[str, int]:
    """The store's event words and their codes."""
    return dict(conn.execute("SELECT name, code FROM event_codes"))


def rig_calibrations(conn: sqlite3.Connection) -> dict[str, float]:
    """Valve calibrations (µL per ms) of the store's rigs that have one."""
    return dict(conn.execute("SELECT name, valve_ul_per_ms FROM rigs WHERE valve_ul_per_ms IS NOT NULL"))


def store_parsed(conn: sqlite3.Connection, parsed: ParsedFile, *, protocol_text: str, protocol_name: str,
                 protocol_version: int, mapping_text: str | None = None) -> Imported:
    """Store a parsed file in the caller's transaction: its import row, sessions, events, raw lines, trials
    (refused when the same bytes were imported, its sessions are stored already from other bytes, or a
    recorder follows the file now); `Imported.grown` names the imported sessions it holds grown."""
    refuse_if_imported(conn, Path(parsed.path), parsed.digest)
    refuse_if_recording(conn, Path(parsed.path))
    remap = parsed.codes.settle(conn)  # words new to the store since the file was parsed
    grown = stored_before(conn, parsed, remap)
    sessions = parsed.sessions
    total_events = sum(len(s.events) for s in sessions)
    total_malformed = sum(s.malformed for s in sessions)
    import_id = conn.execute(
        "INSERT INTO imports (path, sha256, size, format, mapping_text, imported_at, sessions, events, malformed) "
        "VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?)",
        (parsed.path, parsed.digest, parsed.size, "mapped" if parsed.mapped else "wire", mapping_text, time.time(),
         len(sessions), total_events, total_malformed)).lastrowid
    protocol_id = ensure_protocol(conn, protocol_name, protocol_version, protocol_text)
    trials = 0
    for session in sessions:
        trials += _store_session(conn, session, import_id, protocol_id, protocol_name, protocol_version,
                                 protocol_text, remap)
    if parsed.notices and sessions:
        first = conn.execute("SELECT min(id) FROM sessions WHERE import_id = ?", (import_id,)).fetchone()[0]
        conn.executemany("INSERT INTO raw_lines (session_id, line, byte_offset, kind, reason, raw) "
                         "VALUES (?, NULL, NULL, 'notice', ?, NULL)", [(first, n) for n in parsed.notices])
    return Imported(parsed.path, len(sessions), total_events, total_malformed, trials,
                    tuple(s.label for s in sessions), tuple(parsed.notices),
                    tuple(sorted({s.animal for s in sessions})), tuple(grown))


def commit_file(conn: sqlite3.Connection, parsed: ParsedFile, earlier: list[Grown], operator: str, *,
                keep: Callable[[], bool] | None = None, **store_options: Any) -> tuple[Imported, int]:
    """A parsed file in a transaction of its own (BEGIN IMMEDIATE): its rows (`store_parsed`) and the earlier
    imports of it that it supersedes (`supersede`: `earlier`, found by bytes, and the sessions it holds grown,
    found by content); (what it held, sessions superseded). Any error, a Ctrl-C
    included, rolls it back; so does `keep()` saying no just before the commit (then Abandoned)."""
    conn.execute("BEGIN IMMEDIATE")
    try:
        result = store_parsed(conn, parsed, **store_options)
        known = {i for e in earlier for i in e.sessions}
        earlier = earlier + [g for g in result.grown if not known & set(g.sessions)]
        replaced = supersede(conn, earlier, Path(parsed.path), operator) if earlier else 0
        if keep is not None and not keep():
            raise Abandoned(f"{parsed.path}: rolled back")
        conn.execute("COMMIT")
    except BaseException:
        if conn.in_transaction:
            conn.execute("ROLLBACK")
        raise
    return result, replaced


def _store_session(conn: sqlite3.Connection, session: ParsedSession, import_id: int, protocol_id: int,
                   protocol_name: str, protocol_version: int, protocol_text: str, remap: dict[int, int]) -> int:
    animal_id = ensure_animal(conn, session.animal)
    session_id = conn.execute(
        "INSERT INTO sessions (source_id, animal, rig, protocol_name, protocol_version, protocol_text, started_at, "
        "ended_at, start_wall, animal_id, protocol_id, import_id, label, start_device_us) VALUES (NULL, ?, ?, ?, ?, "
        "?, ?, ?, ?, ?, ?, ?, ?, ?)",
        (session.animal, session.rig or "import", protocol_name, protocol_version, protocol_text,
         session.start.timestamp(), session.ended_at, session.start.isoformat(timespec="seconds"), animal_id,
         protocol_id, import_id, session.label, session.start_device_us)).lastrowid
    events = recode(session.events, remap)
    before = conn.execute("SELECT coalesce(max(rowid), 0) FROM events").fetchone()[0]
    insert_rows(conn, session_id, events, session.raw)
    after = conn.execute("SELECT coalesce(max(rowid), 0) FROM events").fetchone()[0]
    if events:
        conn.execute("UPDATE sessions SET first_event = ?, last_event = ? WHERE id = ?", (before + 1, after, session_id))
    if session.trial_rows is None:
        store_trials(conn, session_id, None, [], session.counts, None, session.malformed)
        return 0
    store_trials(conn, session_id, protocol_id, session.trial_rows, session.counts, session.water_ul,
                 session.malformed)
    return len(session.trial_rows)
