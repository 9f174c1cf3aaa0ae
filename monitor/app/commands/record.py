"""`rigside record`: headless acquisition from one source into the store.

Rule: one source (a serial device or a growing file), one session, one store
writer; runs until a stop request (Ctrl-C, SIGTERM, a closed console:
monitor.app.stopping) or `--seconds`, then stops the source, commits
everything it read, closes the session and exits 0. A serial PATH may
be a symlink, a COM name or a pyserial URL; after an unplug it is opened again
by that path (or found by `--usb-serial`). A file the store has never seen is
read from byte 0, a file it has seen resumes at its stored offset, and a file
whose beginning was imported (while the rig still wrote it) is followed from
after the imported bytes, so that no event is stored twice. State
changes are printed to stderr as they happen. Refused (exit 2, one line): a
source another process records into the same store (its lock names it), an
animal the store does not know unless `--new-animal`. It stops at once when
the store writer stops (a deleted or replaced database file, a fault), and
says how many events were read but not stored. "recorded N events" counts
rows stored. Exit 1 when the source never opened, the reader ended on an
error ("connection lost"), or anything read was not stored; a session that
received nothing is removed. Never imports Qt or scipy.
"""

from __future__ import annotations

import argparse
import os
import sys
import threading
import time
from pathlib import Path
from typing import Any, Callable

from monitor.app.errors import UsageError
from monitor.app.paths import add_db_argument, resolve_db

POLL_STATUS_S = 0.25


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--source", required=True, metavar="serial:PATH|file:PATH",
                        help="serial:PATH (device, by-id symlink, COM name, or a pyserial URL such as "
                             "socket://host:port) or file:PATH (a growing log file)")
    parser.add_argument("--mapping", type=Path, help="TOML mapping for a lab's own line format")
    parser.add_argument("--rig", required=True, help="the box's name on this PC")
    parser.add_argument("--animal", required=True, help="the animal in the box")
    parser.add_argument("--protocol", required=True, type=Path, help="training protocol (TOML)")
    add_db_argument(parser)
    parser.add_argument("--seconds", type=float, help="stop after this many seconds (default: until a signal)")
    parser.add_argument("--usb-serial", help="serial: also look for the device by this USB serial number")
    parser.add_argument("--baud", type=int, default=115200, help="serial: baud rate (default 115200)")
    parser.add_argument("--no-reset", action="store_true",
                        help="serial: the board does not reset when the port opens; expect no header")
    parser.add_argument("--new-animal", action="store_true",
                        help="add --animal to the store if it is not there yet (otherwise refused)")


def run(args: argparse.Namespace) -> int:
    kind, _, where = args.source.partition(":")
    if kind not in ("serial", "file") or not where:
        raise UsageError(f"--source: expected serial:PATH or file:PATH, got {args.source!r}")
    if args.seconds is not None and not args.seconds > 0:
        raise UsageError(f"--seconds: must be above 0, got {args.seconds:g}")
    protocol = _read_protocol(args.protocol)
    factory = _decoder_factory(args.mapping)
    key = os.path.abspath(where) if kind == "file" else where

    import sqlite3

    from monitor.store import db
    from monitor.store.source_locks import SourceBusy, resource_key
    from monitor.store.writer import StoreWriter

    writer = StoreWriter(resolve_db(args.db))
    try:
        writer.start()
    except db.StoreError as exc:
        raise UsageError(f"--db: {exc}") from None
    try:
        notice = writer.hold_source(resource_key(kind, where), "rigside record")
        if notice:
            print(f"rigside record: {notice}", file=sys.stderr)
        writer.call(lambda c: _known_animal(c, args.animal, args.new_animal))
        source_id = writer.call(lambda c: db.register_source(
            c, kind, key, args.rig, args.usb_serial, str(args.mapping) if args.mapping else None))
        resume = writer.call(lambda c: db.file_position(c, source_id), transaction=False) if kind == "file" else None
        if resume is not None:
            _check_resume(resume.decoder, factory, where)
        imported = None
        if kind == "file" and resume is None:
            from monitor.store.importer import imported_start

            imported = writer.call(lambda c: imported_start(c, where, factory), transaction=False)
            resume = imported.position if imported else None
        session_id = writer.call(lambda c: _start_session(c, source_id, args, protocol))
    except SourceBusy as exc:
        writer.stop()
        raise UsageError(f"--source: {exc}") from None
    except sqlite3.Error as exc:
        writer.stop()
        raise UsageError(f"--db: {writer.path}: {exc}") from None
    except BaseException:
        writer.stop()
        raise
    return _record(args, kind, where, factory, writer, source_id, session_id, resume, imported)


def _known_animal(conn: Any, animal: str, create: bool) -> None:
    """Refuse an animal the store does not know, unless it may be created."""
    from monitor.store.registry import ensure_animal, find_animal

    if find_animal(conn, animal) is None:
        if not create:
            raise UsageError(f"--animal: no animal {animal!r} in the store (a typo?); "
                             "give --new-animal to add it")
        ensure_animal(conn, animal)


def _start_session(conn: Any, source_id: int, args: argparse.Namespace, protocol: dict[str, Any]) -> int:
    from monitor.store import db
    from monitor.store.registry import ensure_protocol, find_animal

    session_id = db.start_session(conn, source_id, args.animal, args.rig, protocol["name"], protocol["version"],
                                  protocol["text"])
    animal = find_animal(conn, args.animal)
    protocol_id = ensure_protocol(conn, protocol["name"], protocol["version"], protocol["text"])
    conn.execute("UPDATE sessions SET animal_id = ?, protocol_id = ? WHERE id = ?",
                 (animal.id if animal else None, protocol_id, session_id))
    return session_id


def _drop_if_empty(conn: Any, session_id: int) -> bool:
    """Remove a session that received nothing (no event, no line); True when removed."""
    if conn.execute("SELECT 1 FROM events WHERE session_id = ? UNION ALL SELECT 1 FROM raw_lines "
                    "WHERE session_id = ? AND kind != 'notice' LIMIT 1", (session_id, session_id)).fetchone():
        return False
    for table in ("raw_lines", "gaps", "clock_samples"):
        conn.execute(f"DELETE FROM {table} WHERE session_id = ?", (session_id,))
    conn.execute("DELETE FROM sessions WHERE id = ?", (session_id,))
    return True


def _record(args, kind, where, factory, writer, source_id, session_id, resume, imported) -> int:
    from drivers.status import LOST
    from monitor.app.live.pipeline import Fanout
    from monitor.store import db
    from monitor.store.writer import FAILED
    from monitor.store.registry import session_count

    sink = Fanout(writer, source_id=source_id, session_id=session_id, live=kind == "serial")
    number = writer.call(lambda c: session_count(c, args.animal), transaction=False)   # the animal's own count
    if kind == "file":
        from drivers.tail import FileTail

        notice = imported.notice(where) if imported else None
        source: Any = FileTail(where, sink, decoder_factory=factory, resume=resume, resume_notice=notice,
                               should_pause=lambda: writer.backlogged)
        if imported:
            print(f"rigside record: {notice}", file=sys.stderr)
        else:
            print(f"rigside record: {where}: " + ("resuming at byte %d" % resume.offset if resume
                                                  else "never read before: reading from byte 0"), file=sys.stderr)
    else:
        from drivers.serial import SerialSource

        source = SerialSource(where, sink, usb_serial=args.usb_serial, baudrate=args.baud, decoder=factory(),
                              wait_for_header=not args.no_reset and args.mapping is None)

    from monitor.app.stopping import StopRequests

    stop = threading.Event()
    stops = StopRequests(stop.set).install()
    deadline = None if args.seconds is None else time.monotonic() + args.seconds
    try:
        source.start()
        last_state = _watch(source, writer, stop, deadline)
    finally:
        source.stop()
        stops.restore()
    removed = False
    problems: list[str] = []
    unclosed = ""
    if writer.status().state != FAILED:
        try:
            writer.call(lambda c: db.end_session(c, session_id))
            removed = writer.call(lambda c: _drop_if_empty(c, session_id))
        except Exception as exc:  # noqa: BLE001 - the events matter more than the end time: not a failure
            unclosed = f"could not close the session ({exc})"
    writer.stop()
    stops.finished()                    # a console close (Windows) may end the process now
    status, wstatus = source.status(), writer.status()
    # a deleted or replaced database file took every row committed into it along
    not_stored = status.events if wstatus.file_lost else status.events - wstatus.committed_events - \
        wstatus.diverted_events
    where_to = "no session kept: nothing was received" if removed else f"session {number} of {args.animal}"
    stored = 0 if wstatus.file_lost else wstatus.committed_events
    print(f"recorded {stored} events, {status.malformed + wstatus.diverted_events} malformed "
          f"lines, {status.gaps} gaps into {writer.path} ({where_to})")
    if wstatus.state == FAILED:
        problems.append(f"the store writer stopped ({wstatus.last_error}); recording stopped")
    if not_stored > 0 or wstatus.unstored_rows:
        problems.append(f"{not_stored} of {status.events} events read were not stored"
                        + (f", {wstatus.unstored_rows} other rows not stored" if wstatus.unstored_rows else "")
                        + (f" ({wstatus.last_error})" if wstatus.last_error and wstatus.state != FAILED else ""))
    if not getattr(source, "ever_opened", True):
        problems.append(f"{args.source} never opened ({status.last_error or status.text})")
    if status.state == LOST or last_state == LOST:
        problems.append(status.text)
    said = problems + ([unclosed] if unclosed else [])
    if said:  # one line, however many things went wrong
        print(f"rigside record: {'error: ' if problems else ''}{'; '.join(said)}", file=sys.stderr)
    return 1 if problems else 0


def _watch(source: Any, writer: Any, stop: threading.Event, deadline: float | None) -> str:
    """Wait for a signal, the deadline or a failed store writer, printing each change; return the last state."""
    from drivers.status import LOST
    from monitor.store.writer import FAILED

    shown: tuple = (None, None, 0)
    while True:
        status, wstatus = source.status(), writer.status()
        now = (status.state, wstatus.state, status.gaps)
        if now[2] != shown[2] and status.last_gap is not None:
            gap = status.last_gap
            print(f"rigside record: reconnected after {gap.end - gap.start:.1f} s ({gap.reason})", file=sys.stderr)
        if now[:2] != shown[:2]:
            store = "" if wstatus.state == "ok" else f"; store: {wstatus.text}"
            print(f"rigside record: {status.text}{store}", file=sys.stderr)
        shown = now
        if wstatus.state == FAILED:
            return wstatus.state
        if status.state == LOST or stop.is_set() or (deadline is not None and time.monotonic() >= deadline):
            return status.state
        wait = POLL_STATUS_S if deadline is None else min(POLL_STATUS_S, deadline - time.monotonic())
        stop.wait(max(0.0, wait))


def _read_protocol(path: Path) -> dict[str, Any]:
    from drivers.config import ConfigError
    from monitor.core.protocol import parse_protocol

    try:
        text = path.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        raise UsageError(f"--protocol: cannot read {path} ({getattr(exc, 'strerror', None) or exc})") from None
    try:
        protocol = parse_protocol(text, str(path))
    except ConfigError as exc:
        raise UsageError(f"--protocol: {exc}") from None
    return {"name": protocol.name, "version": protocol.version, "text": text}


def _decoder_factory(mapping_path: Path | None) -> Callable[[], Any]:
    from drivers.wire import WireDecoder

    if mapping_path is None:
        return WireDecoder
    from drivers.config import ConfigError
    from drivers.mapping import MappedDecoder, load_mapping

    try:
        mapping = load_mapping(mapping_path)
    except ConfigError as exc:
        raise UsageError(f"--mapping: {exc}") from None
    return lambda: MappedDecoder(mapping)


def _check_resume(state: dict[str, Any], factory: Callable[[], Any], where: str) -> None:
    try:
        factory().restore(state)
    except (ValueError, KeyError, TypeError) as exc:
        raise UsageError(f"--source: {where} was read before in another format ({exc}); "
                         "give the same --mapping as before") from None
