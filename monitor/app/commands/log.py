"""`rigside log verify|head|export --db DB`: check, anchor and export the decision log.

Rule: `verify` reads every entry in insertion order and checks order, links,
hashes and corrections (monitor.store.decisions.verify), and the care log's
chain the same way (monitor.store.care_log.verify); exit 0 with
"N entries, chain intact" (and "M care entries, chain intact" when there
are any), or exit 1 with one
line naming the first broken entry of each broken log and why. `--head SEQ:HASH` (repeatable) also checks heads printed
earlier by `log head`, which catches entries deleted from the end or a
rewritten log; keep them somewhere else (a lab notebook, an e-mail).
`export --csv FILE` writes one row per entry (DECISION_CSV_COLUMNS, cells
escaped as in every rigside CSV). `verify` first runs SQLite's quick_check
over the whole file: a damaged database is refused (exit 2). Read-only.
`verify --lab URL` checks every PC's decision and care chains in the lab
database (a line per PC; exit 1 with one line naming every broken PC, its
first broken entry and, for a care entry, its animal).
"""

from __future__ import annotations

import argparse
import csv
import sys
from pathlib import Path

from monitor.app.errors import UsageError
from monitor.app.lab_access import add_lab_argument, lab_call
from monitor.app.paths import add_db_argument


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("action", choices=("verify", "head", "export"), help="what to do with the log")
    add_db_argument(parser)
    parser.add_argument("--head", action="append", default=[], metavar="SEQ:HASH",
                        help="verify: a head printed earlier by `rigside log head` (repeatable)")
    parser.add_argument("--csv", type=Path, help="export: the CSV file to write")
    parser.add_argument("--animal", help="export: only this animal's entries")
    add_lab_argument(parser, reader=True)


def _heads(values: list[str]):
    from monitor.core.eligibility.decision_log import Head

    heads = []
    for value in values:
        seq, sep, digest = value.partition(":")
        if not sep or not seq.isdigit() or len(digest) != 64:
            raise UsageError(f"--head: expected SEQ:HASH as printed by `rigside log head`, got {value!r}")
        heads.append(Head(int(seq), digest))
    return heads


def run(args: argparse.Namespace) -> int:
    from monitor.store.csv_export import atomic_file, safe_cell
    from monitor.app.commands.report import open_readonly
    from monitor.core.eligibility.decision_log import DECISION_CSV_COLUMNS
    from monitor.store.care_log import verify as care_chain
    from monitor.store.decisions import chain_head, entries, verify

    heads = _heads(args.head)
    if args.action == "export" and args.csv is None:
        raise UsageError("--csv: give the CSV file to write")
    if args.lab is not None:
        if args.action != "verify" or heads:
            raise UsageError("--lab: only `log verify` (without --head) reads the lab")
        return _verify_lab(args.lab)
    conn = open_readonly(args.db, check=args.action == "verify")  # verify checks the whole file first
    try:
        if args.action == "verify":
            result = verify(conn, heads=heads)
            care = care_chain(conn)
            broken = [r.message for r in (result, care) if not r.ok]
            if broken:
                print(f"rigside log verify: BROKEN: {'; '.join(broken)}", file=sys.stderr)
                return 1
            print(result.message)
            if care.entries:
                print(care.message)
            return 0
        if args.action == "head":
            mark = chain_head(conn)
            print("empty log" if mark is None else f"{mark.seq}:{mark.hash}")
            return 0
        rows = [e.csv_row() for e in entries(conn, args.animal)]
    finally:
        conn.close()
    try:
        with atomic_file(args.csv) as out:  # Ctrl-C or a full disk leaves no partial file
            writer = csv.writer(out)
            writer.writerow(DECISION_CSV_COLUMNS)
            for row in rows:
                writer.writerow([safe_cell(row[c]) for c in DECISION_CSV_COLUMNS])
    except OSError as exc:
        raise UsageError(f"--csv: cannot write {args.csv} ({exc.strerror or exc})") from None
    print(f"exported {len(rows)} decisions to {args.csv}")
    return 0


def _verify_lab(url: str) -> int:
    """Every PC's decision and care chains in the lab: one line each; exit 1 if any is broken."""
    from monitor.store.lab_read import verify_chains

    results = lab_call(lambda: list(verify_chains(url)))
    broken = []
    for pc in results:
        if not pc.decisions.ok:
            broken.append(f"{pc.pc}: {pc.decisions.message}")
        if not pc.care.ok:
            whose = f" (animal {pc.care_animal})" if pc.care_animal else ""
            broken.append(f"{pc.pc}: {pc.care.message}{whose}")
    if broken:
        print(f"rigside log verify: BROKEN on {'; '.join(broken)}", file=sys.stderr)
        return 1
    for pc in results:
        print(f"{pc.pc}: {pc.decisions.message}" + (f"; {pc.care.message}" if pc.care.entries else ""))
    if not results:
        print("the lab holds no PC's log yet")
    return 0
