"""`rigside effects --db DB [--cohort NAME] --json|--csv [FILE]`: each manipulation's effect against the stage.

Rule: read-only (monitor.app.services.effects): every manipulation in force, its effect
on five measures against its baseline sessions with 95 % intervals (and
against an acute test's control session; a lasting one's recovery), the
stage frozen when it was recorded, the trends of effect against slow-state
fraction and the table by group. Group labels are codes until the cohort is
unblinded (`rigside manipulation unblind`). `--json` prints one document on
stdout; `--csv` writes one row per manipulation and measure to FILE, or to
stdout when FILE is `-` or not given (a FILE appears only when complete). Bad input: one line, exit 2.
Advisory figures.
"""

from __future__ import annotations

import argparse
import csv
import json
import sys
from pathlib import Path

from monitor.app.errors import UsageError
from monitor.app.paths import add_db_argument


def add_arguments(parser: argparse.ArgumentParser) -> None:
    add_db_argument(parser)
    parser.add_argument("--cohort", help="only this cohort's manipulations")
    out = parser.add_mutually_exclusive_group(required=True)
    out.add_argument("--json", action="store_true", help="print the effects as JSON")
    out.add_argument("--csv", metavar="FILE", nargs="?", const="-",
                     help="write one row per manipulation and measure to FILE (no FILE or '-': stdout)")


def run(args: argparse.Namespace) -> int:
    from monitor.store.csv_export import atomic_file, safe_cell
    from monitor.app.commands.report import open_readonly
    from monitor.app.services.effects import CSV_COLUMNS, csv_rows, effects

    conn = open_readonly(args.db)
    try:
        try:
            result = effects(conn, args.cohort)
        except ValueError as exc:
            raise UsageError(f"--cohort: {exc}") from None
    finally:
        conn.close()
    if args.json:
        print(json.dumps(result, indent=1))
        return 0
    rows = csv_rows(result)

    def write(out) -> None:
        writer = csv.writer(out)
        writer.writerow(CSV_COLUMNS)
        for row in rows:
            writer.writerow([safe_cell(row[c]) for c in CSV_COLUMNS])
    if args.csv == "-":
        write(sys.stdout)
        return 0
    try:
        with atomic_file(Path(args.csv)) as out:   # Ctrl-C or a full disk leaves no partial file
            write(out)
    except OSError as exc:
        raise UsageError(f"--csv: cannot write {args.csv} ({exc.strerror or exc})") from None
    return 0
