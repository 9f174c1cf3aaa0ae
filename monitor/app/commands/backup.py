"""`rigside backup --db DB --to FILE`: a consistent copy of the store, also while recording runs.

Rule: the copy is taken through SQLite's online backup API
(monitor.store.backup): it holds everything committed up to one moment,
including what still sits in the write-ahead log, and appears under FILE only
once complete and checked. FILE must not exist yet. One line on stdout says
what was copied; any failure is one line on stderr and exit 2.
"""

from __future__ import annotations

import argparse
from pathlib import Path

from monitor.app.errors import UsageError
from monitor.app.paths import add_db_argument, resolve_db


def add_arguments(parser: argparse.ArgumentParser) -> None:
    add_db_argument(parser)
    parser.add_argument("--to", required=True, type=Path, metavar="FILE", help="the new backup file")


def run(args: argparse.Namespace) -> int:
    from monitor.store.backup import backup_store
    from monitor.store.db import StoreError

    try:
        result = backup_store(resolve_db(args.db), args.to)
    except StoreError as exc:
        raise UsageError(f"--to: {exc}" if str(exc).startswith(str(args.to)) else f"--db: {exc}") from None
    print(f"backed up {resolve_db(args.db)} to {result.path}: {result.sessions} sessions, {result.events} events, "
          f"{result.bytes / 1e6:.1f} MB")
    return 0
