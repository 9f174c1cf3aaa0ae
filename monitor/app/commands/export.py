"""`rigside export events|trials --db DB --csv FILE` and `rigside export --db DB --nwb DIR`.

Rule: events (columns and cells: monitor.store.csv_export, read and written
a block of rows at a time): a header row, then one row per event in the order it was
stored (EVENT_COLUMNS): `animal`, `session`, `rig`, `segment`, `line`,
`device_time` (the counter as the rig sent it), `t_us` (unwrapped device time
in µs within the segment), `session_time_s` (seconds after the session's
start on the device clock: the trials CSV's origin, monitor.store.session_time),
`wall_time` (ISO 8601 with the session's UTC offset), `event`, `value`.
Trials: one row per derived trial (TRIAL_CSV_COLUMNS, units in
docs/export.md), sessions in time order, excluded sessions included with
their flag. The store is opened read-only and streamed, so exporting never
holds a whole table in memory and never blocks recording. A CSV is written
under a temporary name and renamed when complete; `export_csv` is the work
both this command and the window's File > Export run: it counts rows on a
`Tracker` (a bar on a terminal, not with `--quiet`) and, asked to stop
(Ctrl-C, the window's Cancel), removes the temporary file and leaves any
earlier file under the name untouched (exit 130). A cell that begins with
= + - @ (or a tab or carriage return) and is not a number gets a leading
apostrophe, so a spreadsheet shows it instead of running it. NWB: one file
per session (monitor.store.nwb_export; needs the `nwb` extra), written by
`--jobs` processes side by side (0: one per core), a progress bar or a
line per file and a warning line per animal with an incomplete subject
record on stderr; sessions that fail are named in one error line (exit 1)
after the others are written. `--lab URL` exports events, trials or NWB
from the lab database (monitor.store.lab_read: a scratch copy of every PC's
rows, exported by the same code; session ids of PCs after the first are
shifted by PC number x 10^9).
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path
from typing import NamedTuple

from monitor.app.progress import INTERRUPTED, Progress, Tracker

from monitor.app.errors import UsageError
from monitor.app.lab_access import add_lab_argument, lab_call
from monitor.app.paths import add_db_argument, resolve_db
from monitor.app.settings import add_settings_argument, export_settings, settings_path

from monitor.store.csv_export import write_events_csv, write_trials_csv


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("what", nargs="?", choices=("events", "trials"), help="what to export as CSV")
    add_db_argument(parser)
    parser.add_argument("--csv", type=Path, help="CSV file to write")
    parser.add_argument("--nwb", type=Path, help="directory for NWB files")
    add_settings_argument(parser)
    parser.add_argument("--quiet", action="store_true", help="no progress bar")
    parser.add_argument("--jobs", type=int, default=0,
                        help="NWB: processes writing files side by side (0, the default: one per core)")
    add_lab_argument(parser, reader=True)


def run(args: argparse.Namespace) -> int:
    if args.jobs < 0:
        raise UsageError(f"--jobs: must be 0 (one per core) or more, got {args.jobs}")
    if args.nwb is not None:
        if args.what is not None or args.csv is not None:
            raise UsageError("--nwb: exports everything; give it without events/trials and --csv")
        return _export_lab(args) if args.lab is not None else _export_nwb(args)
    if args.what is None:
        raise UsageError("what: say what to export: events or trials (with --csv FILE), or --nwb DIR")
    if args.csv is None:
        raise UsageError("--csv: give the CSV file to write")
    if args.lab is not None:
        return _export_lab(args)
    return _write_csv(_open(args), args)


class CsvExport(NamedTuple):
    """What `export_csv` did: rows written, or stopped before the file was complete."""

    what: str
    path: Path
    rows: int
    seconds: float
    stopped: bool

    def summary(self, source: str = "") -> str:
        if self.stopped:
            return (f"interrupted: the {self.what} export stopped after {self.rows} rows; "
                    f"nothing was written under {self.path}")
        return f"exported {self.rows} {self.what}{source} to {self.path} in {self.seconds:.1f} s"


class _Stop(Exception):
    """Raised inside the writing block to unwind it (the temporary file is removed)."""


def export_csv(conn, what: str, path: Path, tracker: Tracker) -> CsvExport:
    """Write the `what` ("events" or "trials") CSV from `conn` to `path`, counting rows on `tracker`."""
    import time

    started = time.monotonic()
    table = "events" if what == "events" else "trials"
    tracker.begin(conn.execute(f"SELECT count(*) FROM {table}").fetchone()[0], "row", f"exporting {what}")
    written = [0]

    def tick(rows: int) -> None:
        tracker.advance(rows - written[0])
        written[0] = rows
        if tracker.cancelled():
            raise _Stop()
    try:
        rows = (write_events_csv if what == "events" else write_trials_csv)(conn, path, tick)
    except _Stop:
        return CsvExport(what, path, written[0], time.monotonic() - started, True)
    tracker.advance(rows - written[0])
    return CsvExport(what, path, rows, time.monotonic() - started, False)


def _write_csv(conn, args: argparse.Namespace, source: str = "") -> int:
    """Write the events or trials CSV from `conn` (closed afterwards), with the summary line; the exit code."""
    try:
        with Progress(quiet=args.quiet) as progress:
            result = export_csv(conn, args.what, args.csv, progress)
    except OSError as exc:
        raise UsageError(f"--csv: cannot write {args.csv} ({exc.strerror or exc})") from None
    finally:
        conn.close()
    if result.stopped:
        print(result.summary(), file=sys.stderr)
        return INTERRUPTED
    print(result.summary(source))
    return 0


def _open(args: argparse.Namespace):
    from monitor.store.db import StoreError, open_store

    try:
        return open_store(resolve_db(args.db), readonly=True)
    except StoreError as exc:
        raise UsageError(f"--db: {exc}") from None


def _export_lab(args: argparse.Namespace) -> int:
    import tempfile

    from monitor.store.lab_read import with_copy
    with tempfile.TemporaryDirectory(prefix="rigside-lab-") as directory:
        # every event: the trials CSV counts session time from the first event (monitor.store.session_time)
        conn = lab_call(lambda: with_copy(args.lab, directory, events="all"))
        if args.nwb is not None:
            conn.close()
            return _export_nwb(args, Path(directory) / "lab-copy.sqlite3")
        return _write_csv(conn, args, " from the lab")


def _export_nwb(args: argparse.Namespace, copy: Path | None = None) -> int:
    """NWB files from the store at --db, or from `copy` (the lab's rows in a scratch store)."""
    from importlib.util import find_spec

    if find_spec("pynwb") is None:  # found, not imported: the export imports it while its workers start
        raise UsageError("--nwb: needs pynwb (pip install 'rigside[nwb]')")
    from monitor.store.db import open_store

    try:
        settings = export_settings(settings_path(args.settings))
    except ValueError as exc:
        raise UsageError(f"--settings: {exc}") from None
    conn = _open(args) if copy is None else open_store(copy, readonly=True)
    try:
        with Progress(quiet=args.quiet) as progress:
            result = export_nwb_files(conn, args.nwb, settings, progress, workers=args.jobs or None)
    except OSError as exc:
        raise UsageError(f"--nwb: cannot write into {args.nwb} ({exc.strerror or exc})") from None
    finally:
        conn.close()
    for line in result.warnings:
        print(f"rigside export: warning: {line}", file=sys.stderr)
    if result.stopped:
        print(result.summary(), file=sys.stderr)
        return INTERRUPTED
    print(result.summary())
    if result.failed:
        print(f"rigside export: error: {len(result.failed)} sessions not written: {'; '.join(result.failed)}",
              file=sys.stderr)
        return 1
    return 0


class NwbExport(NamedTuple):
    """What `export_nwb_files` did: the files written (each whole), failures, warnings, stopped or not."""

    folder: Path
    written: list[Path]
    total: int
    failed: list[str]
    warnings: list[str]
    seconds: float
    stopped: bool

    def summary(self) -> str:
        if self.stopped:
            last = f" (the last: {self.written[-1].name})" if self.written else ""
            return (f"interrupted: {len(self.written)} of {self.total} sessions exported to {self.folder}{last}, "
                    "each file whole; the others were not written")
        return f"exported {len(self.written)} sessions to {self.folder} in {self.seconds:.1f} s"


def export_nwb_files(conn, folder: Path, settings: dict, tracker: Tracker, workers: int | None = None) -> NwbExport:
    """One NWB file per session into `folder` (`workers` processes), counting sessions on `tracker`; asked to
    stop, it finishes the files under way and starts no other."""
    import time

    from monitor.store.nwb_export import Stopped, export_nwb

    started = time.monotonic()
    total = [0]

    def one_more(done: int, count: int, path: Path) -> None:
        if not total[0]:
            total[0] = count
            tracker.begin(count, "session", "exporting NWB")
        tracker.advance()
        tracker.say(f"[{done}/{count}] {path.name}")
        if tracker.cancelled():
            raise Stopped()
    result = export_nwb(conn, folder, settings, one_more, workers=workers)
    return NwbExport(folder, result.written, total[0] or len(result.written), result.failed, result.warnings,
                     time.monotonic() - started, result.interrupted)
