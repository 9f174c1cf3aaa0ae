"""`rigside export events --db DB --csv FILE`: every stored event as one CSV row.

Rule: a header row, then one row per event in the order it was stored, with
the columns `animal`, `session`, `rig`, `segment`, `line`, `device_time` (the
counter as the rig sent it), `t_us` (unwrapped device time in µs within the
segment), `event`, `value`. The store is opened read-only and streamed, so
exporting never holds the whole table in memory and never blocks recording.
A cell that begins with = + - @ (or a tab or carriage return) and is not a
number gets a leading apostrophe, so a spreadsheet shows it instead of running
it. `export trials` and `--nwb` come with the store's trial tables: until
then they are refused with a one-line message.
"""

from __future__ import annotations

import argparse
import csv
import re
from pathlib import Path

from monitor.app.errors import UsageError
from monitor.app.paths import add_db_argument, resolve_db

EVENT_COLUMNS = ("animal", "session", "rig", "segment", "line", "device_time", "t_us", "event", "value")
_NUMBER = re.compile(r"^[+-]?(\d+(\.\d*)?|\.\d+)([eE][+-]?\d+)?$")
_FORMULA_START = ("=", "+", "-", "@", "\t", "\r")

_EVENTS_SQL = """
SELECT s.animal, e.session_id, s.rig, e.segment, e.line, e.raw_time, e.t_us, c.name, e.value
FROM events AS e
JOIN sessions AS s ON s.id = e.session_id
JOIN event_codes AS c ON c.code = e.code
ORDER BY e.rowid
"""


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("what", nargs="?", choices=("events", "trials"), help="what to export as CSV")
    add_db_argument(parser)
    parser.add_argument("--csv", type=Path, help="CSV file to write")
    parser.add_argument("--nwb", type=Path, help="directory for NWB files")


def run(args: argparse.Namespace) -> int:
    if args.nwb is not None:
        raise UsageError("--nwb: NWB export is not available yet (it comes with the store's trial tables)")
    if args.what == "trials":
        raise UsageError("trials: trial export is not available yet (it comes with the store's trial tables)")
    if args.what != "events":
        raise UsageError("what: say what to export: events (with --csv FILE)")
    if args.csv is None:
        raise UsageError("--csv: give the CSV file to write")
    from monitor.store.db import StoreError, open_store

    try:
        conn = open_store(resolve_db(args.db), readonly=True)
    except StoreError as exc:
        raise UsageError(f"--db: {exc}") from None
    try:
        rows = write_events_csv(conn, args.csv)
    except OSError as exc:
        raise UsageError(f"--csv: cannot write {args.csv} ({exc.strerror or exc})") from None
    finally:
        conn.close()
    print(f"exported {rows} events to {args.csv}")
    return 0


def write_events_csv(conn, path: Path) -> int:
    """Stream every event to `path`; return the number of rows written."""
    count = 0
    with open(path, "w", newline="", encoding="utf-8") as out:
        writer = csv.writer(out)
        writer.writerow(EVENT_COLUMNS)
        for row in conn.execute(_EVENTS_SQL):
            writer.writerow([safe_cell(v) for v in row])
            count += 1
    return count


def safe_cell(value: object) -> object:
    """The value, or text that a spreadsheet will not read as a formula."""
    if isinstance(value, str) and value.startswith(_FORMULA_START) and not _NUMBER.match(value):
        return "'" + value
    return "" if value is None else value
