"""`rigside export events|trials --db DB --csv FILE` and `rigside export --db DB --nwb DIR`.

Rule: the CSVs (their columns and cells: monitor.store.csv_export) are
read from the store opened read-only, a block of rows at a time, so
exporting never holds a whole table in memory and never blocks recording.
NWB: one file per session (monitor.store.nwb_export; needs the `nwb`
extra), written by `--jobs` processes side by side (0: one per core), a
progress bar (or a line per file) and a warning line per animal with an
incomplete subject record on stderr; sessions that fail are named in one
error line (exit 1) after the others are written; Ctrl-C stops the export
and names how many files were written (exit 130), none of them partial.
`--lab URL` exports events, trials or NWB from the lab database
(monitor.store.lab_read: a scratch copy of every PC's rows, exported by the
same code; session ids of PCs after the first are shifted by PC number x
10^9).
"""

from __future__ import annotations

import argparse
from pathlib import Path

from monitor.app.errors import UsageError
from monitor.app.lab_access import add_lab_argument, lab_call
from monitor.app.paths import add_db_argument, resolve_db
from monitor.app.settings import add_settings_argument, export_settings, settings_path
from monitor.store.csv_export import (EVENT_COLUMNS, TRIAL_CSV_COLUMNS,  # noqa: F401 - named here for callers
                                      safe_cell, write_events_csv, write_trials_csv)

def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("what", nargs="?", choices=("events", "trials"), help="what to export as CSV")
    add_db_argument(parser)
    parser.add_argument("--csv", type=Path, help="CSV file to write")
    parser.add_argument("--nwb", type=Path, help="directory for NWB files")
    add_settings_argument(parser)
    parser.add_argument("--quiet", action="store_true", help="no progress bar (NWB)")
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
    rows = _write_csv(_open(args), args)
    print(f"exported {rows} {args.what} to {args.csv}")
    return 0


def _write_csv(conn, args: argparse.Namespace) -> int:
    """Write the events or trials CSV from `conn` (closed afterwards); return the rows written."""
    try:
        return (write_events_csv if args.what == "events" else write_trials_csv)(conn, args.csv)
    except OSError as exc:
        raise UsageError(f"--csv: cannot write {args.csv} ({exc.strerror or exc})") from None
    finally:
        conn.close()


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
        rows = _write_csv(conn, args)
    print(f"exported {rows} {args.what} from the lab to {args.csv}")
    return 0


def _export_nwb(args: argparse.Namespace, copy: Path | None = None) -> int:
    """NWB files from the store at --db, or from `copy` (the lab's rows in a scratch store)."""
    import sys

    from importlib.util import find_spec

    if find_spec("pynwb") is None:  # found, not imported: the export imports it while its workers start
        raise UsageError("--nwb: needs pynwb (pip install 'rigside[nwb]')")
    from monitor.app.progress import Progress
    from monitor.store.db import open_store
    from monitor.store.nwb_export import export_nwb

    try:
        settings = export_settings(settings_path(args.settings))
    except ValueError as exc:
        raise UsageError(f"--settings: {exc}") from None
    conn = _open(args) if copy is None else open_store(copy, readonly=True)
    bar: list[Progress] = []  # made at the first file, when the number of sessions is known

    def written(done: int, total: int, path: Path) -> None:
        if not bar:
            bar.append(Progress(total, "session", "exporting NWB", quiet=args.quiet))
        bar[0].advance(done - bar[0].done)
        bar[0].say(f"[{done}/{total}] {path.name}")

    try:
        result = export_nwb(conn, args.nwb, settings, written, workers=args.jobs or None)
    except OSError as exc:
        raise UsageError(f"--nwb: cannot write into {args.nwb} ({exc.strerror or exc})") from None
    finally:
        conn.close()
        for progress in bar:
            progress.close()
    for line in result.warnings:
        print(f"rigside export: warning: {line}", file=sys.stderr)
    if result.interrupted:
        print(f"rigside export: interrupted: {len(result.written)} sessions written whole to {args.nwb}; the others "
              "not started (run the export again for all)", file=sys.stderr)
        return 130
    print(f"exported {len(result.written)} sessions to {args.nwb}")
    if result.failed:
        print(f"rigside export: error: {len(result.failed)} sessions not written: {'; '.join(result.failed)}",
              file=sys.stderr)
        return 1
    return 0
