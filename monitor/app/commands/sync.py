"""`rigside sync --db DB --lab URL`: push everything new in this PC's store to the lab database.

Rule: exactly once, safe to re-run, resumable after a kill or a dropped
connection (monitor.store.lab_sync). Prints one line: rows sent per kind and
the time taken. The URL comes from `--lab`, $RIGSIDE_LAB or the settings
file. An unreachable server, or a statement the server fails: one line,
exit 1, nothing lost (the next sync catches up). A missing --db file (it
would register an empty PC), a lab not set up, or data the lab refuses (an
animal name two PCs use without lab ids telling them apart): one line, exit 2.
On a terminal a progress bar counts each appended table's rows (not with
`--quiet`); Ctrl-C stops after the chunk being sent (every committed chunk
stays in the lab), names how far it got and exits 130: the next sync sends
the rest.
"""

from __future__ import annotations

import argparse
import sys

from monitor.app.errors import Fault, UsageError
from monitor.app.lab_access import add_lab_argument, lab_call, resolve_lab
from monitor.app.paths import add_db_argument, resolve_db
from monitor.app.progress import INTERRUPTED, Progress
from monitor.app.settings import add_settings_argument


def add_arguments(parser: argparse.ArgumentParser) -> None:
    add_db_argument(parser)
    add_lab_argument(parser)
    add_settings_argument(parser)
    parser.add_argument("--pc-name", help="this PC's name in the lab (default: the stored one, else the host name)")
    parser.add_argument("--chunk-rows", type=int, default=None, metavar="N",
                        help="rows per committed chunk (default 50000)")
    parser.add_argument("--progress", action="store_true", help="a line on stderr per committed chunk")
    parser.add_argument("--quiet", action="store_true", help="no progress bar")


class _Stop(Exception):
    """Ctrl-C: stop after the chunk just committed."""


def run(args: argparse.Namespace) -> int:
    from monitor.store.connection import Busy
    from monitor.store.db import StoreError, open_store
    from monitor.store.lab_sync import CHUNK_ROWS, sync

    url = resolve_lab(args.lab, args.settings)
    if args.chunk_rows is not None and args.chunk_rows < 1:
        raise UsageError(f"--chunk-rows: expected a positive number, got {args.chunk_rows}")
    path = resolve_db(args.db)
    if not path.is_file():  # a mistyped path must not register an empty PC in the lab
        raise UsageError(f"--db: {path}: no such database")
    try:
        conn = open_store(path)
    except StoreError as exc:
        raise UsageError(f"--db: {exc}") from None

    reached: dict[str, tuple[int, int]] = {}  # table -> (last row sent, last row to send)

    def work() -> int:
        with Progress(quiet=args.quiet) as bar:
            def chunk_sent(table: str, done: int, end: int) -> None:
                if table not in reached:
                    bar.begin(end, "row", f"sending {table}")
                bar.advance(done - bar.done)
                reached[table] = (done, end)
                if args.progress:
                    bar.say(f"{table}: up to row {done} of {end}")
                if bar.cancelled():
                    raise _Stop()
            try:
                result = sync(conn, url, pc_name=args.pc_name, chunk_rows=args.chunk_rows or CHUNK_ROWS,
                              progress=chunk_sent)
            except _Stop:
                sent = ", ".join(f"{table} up to row {done} of {end}" for table, (done, end) in reached.items())
                print(f"interrupted: sent and committed {sent}; the next `rigside sync` sends the rest",
                      file=sys.stderr)
                return INTERRUPTED
        parts = [f"{n} {table}" for table, n in result.sent.items() if n]
        print(f"synced {result.total} rows as {result.pc_name} (PC {result.pc_number}) in {result.seconds:.2f} s"
              + (f": {', '.join(parts)}" if parts else ": nothing new"))
        return 0

    try:
        return lab_call(work)
    except Busy as exc:  # the local store stayed locked past its busy timeout
        raise Fault(f"--db: {path}: {exc}; nothing was lost, sync again later") from None
    finally:
        conn.close()
