"""`rigside animal add|edit|retire|list|history`: subject records, every change logged.

Rule: `add NAME` records a new animal with the subject options given; `edit
NAME` changes only the options given (an empty value clears a field);
`retire NAME --reason TEXT` marks it out of training; `list [--json]` prints
every animal with the subject fields a shared data file still lacks; `history
NAME` prints the change log (who, when, old -> new). Who: `--operator`, else
this PC's user name. Each write is one transaction (monitor.store.animals);
bad input is one line naming the option, exit 2.
"""

from __future__ import annotations

import argparse
import getpass
import json
import sys

from monitor.app.errors import UsageError
from monitor.app.paths import add_db_argument
from monitor.app.store_access import write_transaction

WAIT_S = 30.0  # seconds to wait for another process holding the store's write lock
# option -> subject field (monitor.store.animals.SUBJECT_FIELDS)
OPTIONS = {"--lab-id": "lab_id", "--cohort": "cohort", "--species": "species", "--sex": "sex",
           "--date-of-birth": "date_of_birth", "--age-days": "age_days", "--strain": "strain",
           "--genotype": "genotype", "--supplier": "supplier", "--baseline-weight-g": "baseline_weight_g",
           "--baseline-weight-date": "baseline_weight_date", "--notes": "notes"}
_HELP = {"--species": "binomial name, e.g. 'Rattus norvegicus'", "--sex": "F, M, U (unknown) or O (other)",
         "--date-of-birth": "YYYY-MM-DD", "--age-days": "age in days today (when the birth date is not known)",
         "--baseline-weight-g": "baseline body weight, g", "--baseline-weight-date": "YYYY-MM-DD of that weighing"}


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("action", choices=("add", "edit", "retire", "list", "history"))
    parser.add_argument("name", nargs="?", help="the animal (add, edit, retire, history)")
    add_db_argument(parser)
    for option, field in OPTIONS.items():
        kind = {"age_days": int, "baseline_weight_g": float}.get(field, str)
        parser.add_argument(option, dest=field, type=kind, help=_HELP.get(option))
    parser.add_argument("--reason", help="retire: why the animal leaves training")
    parser.add_argument("--operator", help="who makes the change (default: this PC's user name)")
    parser.add_argument("--json", action="store_true", help="list: JSON instead of a table")


def run(args: argparse.Namespace) -> int:
    if args.action == "list":
        return _list(args)
    if not args.name:
        raise UsageError(f"name: say which animal to {args.action}")
    if args.action == "history":
        return _history(args)
    from monitor.store import animals
    from monitor.store.registry import RecordError

    fields = {f: getattr(args, f) for f in OPTIONS.values() if getattr(args, f) is not None}
    operator = args.operator or getpass.getuser()

    def work(conn):
        if args.action == "add":
            animals.add_animal(conn, args.name, operator, **fields)
            return [f for f, v in fields.items() if v != ""]
        if args.action == "edit":
            if not fields:
                raise UsageError("edit: give at least one field to change (see --help)")
            return animals.edit_animal(conn, args.name, operator, **fields)
        if fields:
            raise UsageError("retire: takes --reason only")
        animals.retire_animal(conn, args.name, operator, args.reason or "")
        return ["retired"]

    try:
        changed = write_transaction(args.db, WAIT_S, work)
    except RecordError as exc:
        field, _, rest = str(exc).partition(": ")
        raise UsageError(f"{_option(field)}: {rest}") from None
    what = ", ".join(changed) if changed else "nothing changed"
    print(f"{args.name}: {args.action} recorded by {operator} ({what})")
    return 0


def _option(field: str) -> str:
    names = {v: k for k, v in OPTIONS.items()}
    return names.get(field) or {"animal": "name", "operator": "--operator", "reason": "--reason"}.get(field, field)


def _read(args: argparse.Namespace):
    from monitor.store.db import StoreError, open_store
    from monitor.app.paths import resolve_db

    try:
        return open_store(resolve_db(args.db), readonly=True)
    except StoreError as exc:
        raise UsageError(f"--db: {exc}") from None


def _list(args: argparse.Namespace) -> int:
    from monitor.store.animals import list_animals

    conn = _read(args)
    try:
        records = list_animals(conn)
    finally:
        conn.close()
    if args.json:
        json.dump({"animals": records}, sys.stdout, indent=1)
        print()
        return 0
    columns = ("name", "lab_id", "cohort", "species", "sex", "date_of_birth", "strain", "genotype", "sessions")
    rows = [[str(r[c] if r[c] is not None else "") for c in columns] + [
        "retired" if r["retired_at"] else ("missing: " + ", ".join(r["missing"]) if r["missing"] else "complete")]
        for r in records]
    header = [*columns, "record"]
    widths = [max(len(str(x)) for x in column) for column in zip(header, *rows)]
    for row in (header, *rows):
        print("  ".join(cell.ljust(w) for cell, w in zip(row, widths)).rstrip())
    return 0


def _history(args: argparse.Namespace) -> int:
    from monitor.store.animals import changes_of, get_animal

    conn = _read(args)
    try:
        if get_animal(conn, args.name) is None:
            raise UsageError(f"name: no animal {args.name!r} in the database")
        changes = changes_of(conn, args.name)
    finally:
        conn.close()
    for c in changes:
        print(f"{c['at']}  {c['by']}  {c['field']}: {c['old'] if c['old'] is not None else '-'} -> "
              f"{c['new'] if c['new'] is not None else '-'}")
    return 0
