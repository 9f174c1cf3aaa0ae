"""`rigside record`: headless acquisition from one source into the store.

Rule: one source (a serial device or a growing file), one session, one store
writer; runs until SIGINT/SIGTERM or `--seconds`, then stops the source,
commits everything it read, closes the session and exits 0. A serial PATH may
be a symlink, a COM name or a pyserial URL; after an unplug it is opened again
by that path (or found by `--usb-serial`). A file the store has never seen is
read from byte 0, a file it has seen resumes at its stored offset. State
changes are printed to stderr as they happen. Exit 1 when the reader ended on
an error ("connection lost") or rows could not be stored. Never imports Qt or
scipy.
"""

from __future__ import annotations

import argparse
import os
import signal
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
                        help="serial: the board does not reset when the port opens; do not wait for its header")


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
    from monitor.store.writer import StoreWriter

    writer = StoreWriter(resolve_db(args.db))
    try:
        writer.start()
    except db.StoreError as exc:
        raise UsageError(f"--db: {exc}") from None
    try:
        source_id = writer.call(lambda c: db.register_source(
            c, kind, key, args.rig, args.usb_serial, str(args.mapping) if args.mapping else None))
        resume = writer.call(lambda c: db.file_position(c, source_id), transaction=False) if kind == "file" else None
        if resume is not None:
            _check_resume(resume.decoder, factory, where)
        session_id = writer.call(lambda c: db.start_session(
            c, source_id, args.animal, args.rig, protocol["name"], protocol["version"], protocol["text"]))
    except sqlite3.Error as exc:
        writer.stop()
        raise UsageError(f"--db: {writer.path}: {exc}") from None
    except BaseException:
        writer.stop()
        raise
    return _record(args, kind, where, factory, writer, source_id, session_id, resume)


def _record(args, kind, where, factory, writer, source_id, session_id, resume) -> int:
    from drivers.status import LOST
    from monitor.app.pipeline import Fanout
    from monitor.store import db
    from monitor.store.records import sessions_of

    sink = Fanout(writer, source_id=source_id, session_id=session_id, live=kind == "serial")
    number = writer.call(lambda c: len(sessions_of(c, args.animal)), transaction=False)   # the animal's own count
    if kind == "file":
        from drivers.tail import FileTail

        source: Any = FileTail(where, sink, decoder_factory=factory, resume=resume,
                               should_pause=lambda: writer.backlogged)
        print(f"rigside record: {where}: " + ("resuming at byte %d" % resume.offset if resume
                                              else "never read before: reading from byte 0"), file=sys.stderr)
    else:
        from drivers.serial import SerialSource

        source = SerialSource(where, sink, usb_serial=args.usb_serial, baudrate=args.baud, decoder=factory(),
                              wait_for_header=not args.no_reset and args.mapping is None)

    stop = threading.Event()
    previous = {sig: signal.signal(sig, lambda *_: stop.set()) for sig in (signal.SIGINT, signal.SIGTERM)}
    deadline = None if args.seconds is None else time.monotonic() + args.seconds
    try:
        source.start()
        last_state = _watch(source, writer, stop, deadline)
    finally:
        source.stop()
        for sig, handler in previous.items():
            signal.signal(sig, handler)
    try:
        writer.call(lambda c: db.end_session(c, session_id))
    except Exception as exc:  # noqa: BLE001 - the events matter more than the end time
        print(f"rigside record: could not mark the session ended: {exc}", file=sys.stderr)
    stored = writer.stop()
    status, wstatus = source.status(), writer.status()
    print(f"recorded {status.events} events, {status.malformed} malformed lines, {status.gaps} gaps "
          f"into {writer.path} (session {number} of {args.animal})")
    if not stored:
        print(f"rigside record: error: {wstatus.pending_rows} rows could not be stored: {wstatus.last_error}",
              file=sys.stderr)
    if status.state == LOST or last_state == LOST:
        print(f"rigside record: error: {status.text}", file=sys.stderr)
        return 1
    return 0 if stored and wstatus.dropped_events == 0 else 1


def _watch(source: Any, writer: Any, stop: threading.Event, deadline: float | None) -> str:
    """Wait for a signal or the deadline, printing each change of state; return the last state."""
    from drivers.status import LOST

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
