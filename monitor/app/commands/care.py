"""`rigside care weigh|supplement|note|baseline|sheet --db DB ...`: the care log and the daily water ledger.

Rule: `weigh`, `supplement` and `note` add one care-log row for a known
animal (time: `--at` ISO 8601 with offset, default now). A weight or volume
that no animal of the species could have is refused; an unusual one, or a
weighing far from the last, needs `--confirm REASON` (limits:
monitor.core.care.limits). `void --entry ID` and `correct --entry ID` add an
entry that voids or replaces an earlier one, with `--reason` and `--by`; the
original stays in the log. `list --animal` prints an animal's entries with
their ids. `baseline` sets the
animal's baseline weight (the reference for percent of baseline). `sheet
--day DATE` prints each animal's care day (water earned in sessions +
supplements against the daily minimum, weight and percent of baseline, the
alerts) and with `--csv FILE` writes the care sheet (CARE_SHEET_COLUMNS of
monitor.core.care.ledger). Thresholds come from the `[care]` table of `--settings
FILE`, else of the user's default settings file (monitor.app.settings), else
the defaults (keys and defaults: docs/care.md). Bad input: one
line, exit 2. Advisory: the approved animal-use protocol, the animal-care
committee and the veterinarian decide; follow local rules.
"""

from __future__ import annotations

import argparse
from datetime import date, datetime
from pathlib import Path

from monitor.app.errors import UsageError
from monitor.app.paths import add_db_argument
from monitor.app.settings import add_settings_argument
from monitor.app.store_access import write_transaction

WAIT_S = 30.0  # seconds to wait for another process holding the store's write lock


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("action", choices=("weigh", "supplement", "note", "baseline", "sheet", "list", "void",
                                           "correct"))
    add_db_argument(parser)
    parser.add_argument("--animal", help="the animal (all animals for sheet)")
    parser.add_argument("--grams", type=float, help="weigh: body weight; baseline: baseline weight (g)")
    parser.add_argument("--ml", type=float, help="supplement: volume given (ml)")
    parser.add_argument("--by", help="who did it")
    parser.add_argument("--text", help="note: the health note")
    parser.add_argument("--at", help="when (ISO 8601 with UTC offset; default now)")
    parser.add_argument("--day", help="sheet: the care day (ISO date; default today)")
    parser.add_argument("--csv", type=Path, help="sheet: also write the care sheet to this CSV file")
    parser.add_argument("--confirm", metavar="REASON",
                        help="weigh, supplement, correct: record an unusual value anyway, saying why it is right")
    parser.add_argument("--entry", type=int, help="void, correct: the care entry's id (see `care list`)")
    parser.add_argument("--reason", help="void, correct: why")
    add_settings_argument(parser)


def run(args: argparse.Namespace) -> int:
    if args.action == "sheet":
        return _sheet(args)
    if args.action == "list":
        return _list(args)
    if args.action in ("void", "correct"):
        return _replace(args)
    if not args.animal:
        raise UsageError("--animal: say which animal")
    from monitor.store import care_log
    from monitor.store.registry import ensure_animal, find_animal

    at = args.at or datetime.now().astimezone().isoformat(timespec="seconds")

    def record(conn) -> None:
        if find_animal(conn, args.animal) is None:
            raise UsageError(f"--animal: no animal {args.animal!r} in the database")
        if args.action == "weigh":
            care_log.add_weighing(conn, args.animal, at=at, grams=_need(args.grams, "--grams"),
                                  by=_need(args.by, "--by"), confirmed=args.confirm)
        elif args.action == "supplement":
            care_log.add_supplement(conn, args.animal, at=at, ml=_need(args.ml, "--ml"), by=_need(args.by, "--by"),
                                    note=args.text or "", confirmed=args.confirm)
        elif args.action == "note":
            care_log.add_note(conn, args.animal, at=at, by=_need(args.by, "--by"), text=_need(args.text, "--text"))
        else:
            ensure_animal(conn, args.animal, baseline_weight_g=_need(args.grams, "--grams"))

    _store(args, record)
    print(f"{args.animal}: {args.action} recorded ({at})")
    return 0


def _store(args: argparse.Namespace, work) -> object:
    """Run `work(conn)` in one write transaction; a RecordError becomes a one-line error naming the option."""
    from monitor.store.care_log import NeedsConfirmation
    from monitor.store.registry import RecordError

    try:
        return write_transaction(args.db, WAIT_S, work)
    except RecordError as exc:
        field = str(exc).split(":")[0]
        option = {"time": "--at", "by": "--by", "ml": "--ml", "grams": "--grams", "baseline_weight_g": "--grams",
                  "text": "--text", "animal": "--animal", "entry": "--entry", "reason": "--reason",
                  }.get(field, "--" + field)
        hint = " (--confirm REASON)" if isinstance(exc, NeedsConfirmation) else ""
        raise UsageError(f"{option}: {exc}{hint}") from None


def _replace(args: argparse.Namespace) -> int:
    """`void` or `correct` an entry by a new one."""
    from monitor.store import care_log

    entry = _need(args.entry, "--entry")

    def work(conn) -> int:
        if args.action == "void":
            return care_log.void_entry(conn, entry, by=_need(args.by, "--by"), reason=_need(args.reason, "--reason"))
        if args.grams is not None and args.ml is not None:
            raise UsageError("--grams/--ml: give the one corrected amount")
        return care_log.correct_entry(conn, entry, by=_need(args.by, "--by"), reason=_need(args.reason, "--reason"),
                                      amount=args.grams if args.grams is not None else args.ml, text=args.text,
                                      at=args.at, confirmed=args.confirm)

    new = _store(args, work)
    print(f"care entry {entry} {'voided' if args.action == 'void' else 'corrected'} by entry {new}")
    return 0


def _list(args: argparse.Namespace) -> int:
    from monitor.app.commands.report import known_animal, open_readonly
    from monitor.store.care_log import entries_of

    animal = _need(args.animal, "--animal")
    conn = open_readonly(args.db)
    try:
        known_animal(conn, animal)
        rows = entries_of(conn, animal)
    finally:
        conn.close()
    units = {"weight": "g", "supplement": "ml"}
    for row in rows:
        amount = "" if row["amount"] is None else f" {row['amount']:g} {units.get(row['kind'], '')}"
        change = f" [{row['action']} of {row['replaces']}: {row['reason']}]" if row["action"] else ""
        confirmed = f" [confirmed: {row['confirmed']}]" if row["confirmed"] else ""
        text = f" {row['text']!r}" if row["text"] else ""
        state = "" if row["live"] else " (not counted)"
        print(f"{row['id']}: {row['at']} {row['kind']}{amount}{text} by {row['by']}{change}{confirmed}{state}")
    if not rows:
        print(f"{animal}: no care entries")
    return 0


def _need(value, option: str):
    if value is None or (isinstance(value, str) and not value.strip()):
        raise UsageError(f"{option}: needed for this action")
    return value


def _sheet(args: argparse.Namespace) -> int:
    from monitor.app.services.judging import CARE_CAUTION, care_day, care_line, write_care_csv
    from monitor.app.settings import care_config, settings_path
    from monitor.app.commands.report import known_animal, open_readonly
    from monitor.store.registry import animal_names

    try:
        day = date.fromisoformat(args.day) if args.day else date.today()
    except ValueError:
        raise UsageError(f"--day: expected an ISO date, got {args.day!r}") from None
    try:
        config = care_config(settings_path(args.settings))
    except ValueError as exc:
        raise UsageError(f"--settings: {exc}") from None
    conn = open_readonly(args.db)
    try:
        if args.animal:
            known_animal(conn, args.animal)
        names = [args.animal] if args.animal else animal_names(conn)
        summaries = care_day(conn, names, day, config, datetime.now().astimezone())
    finally:
        conn.close()
    for s in summaries:
        print(f"{s.animal} {s.day}: {care_line(s)}")
        for alert in s.alerts:
            print(f"  {alert.level.upper()}: {alert.message}")
    print(CARE_CAUTION)
    if args.csv is not None:
        try:
            write_care_csv(args.csv, summaries)
        except OSError as exc:
            raise UsageError(f"--csv: cannot write {args.csv} ({exc.strerror or exc})") from None
    return 0
