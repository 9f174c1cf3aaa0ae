"""`rigside manipulation add|list|withdraw|unblind`: the manipulation log.

Rule: `add --animal NAME --acute|--lasting --what TEXT --session N [--control]
[--control-session M] [--group NAME] --operator NAME --reason TEXT [--time T]` appends a
hash-chained entry with the stage frozen at the last session before session N
(sessions are the report's indexes, from 1) and flags the affected sessions
excluded, in one BEGIN IMMEDIATE transaction (monitor.app.services.effects); the group
comes from the animal's latest `assigned` decision unless `--group` names it
(a code in a blinded cohort). `list [--animal NAME] [--json]` prints the log
and says whether its chain holds. `withdraw --seq N` appends an entry that
withdraws entry N (nothing is edited). `unblind --cohort NAME` records that
the cohort's group names may be shown by `rigside effects` and the window.
Bad input: one line, exit 2, nothing written; a broken chain on `list`: exit 1.
"""

from __future__ import annotations

import argparse
import json
import sys

from monitor.app.errors import UsageError
from monitor.app.paths import add_db_argument
from monitor.app.store_access import write_transaction


def add_arguments(parser: argparse.ArgumentParser) -> None:
    sub = parser.add_subparsers(dest="action", required=True, parser_class=type(parser))
    add = sub.add_parser("add", help="record a manipulation")
    add_db_argument(add)
    add.add_argument("--animal", required=True)
    duration = add.add_mutually_exclusive_group(required=True)
    duration.add_argument("--acute", dest="duration", action="store_const", const="acute",
                          help="one test session (e.g. an inactivation)")
    duration.add_argument("--lasting", dest="duration", action="store_const", const="lasting",
                          help="every session from --session on (e.g. a lesion)")
    add.add_argument("--what", required=True, help="what was done (e.g. 'muscimol M1 0.5 ul', 'saline')")
    add.add_argument("--session", required=True, type=int, help="the first affected session (report index)")
    add.add_argument("--control", action="store_true", help="a control (vehicle, sham) that should remove nothing")
    add.add_argument("--control-session", type=int, help="an acute test's control session (report index)")
    add.add_argument("--group", help="the group (a code when blinded); default: the animal's assignment")
    add.add_argument("--operator", required=True)
    add.add_argument("--reason", required=True)
    add.add_argument("--time", help="when it was made: ISO 8601 date-time with UTC offset (default now)")
    add.add_argument("--wait", type=float, default=30.0, help="seconds to wait for another writer (default 30)")
    listing = sub.add_parser("list", help="print the manipulation log")
    add_db_argument(listing)
    listing.add_argument("--animal")
    listing.add_argument("--json", action="store_true")
    withdraw = sub.add_parser("withdraw", help="withdraw an entry recorded by mistake")
    add_db_argument(withdraw)
    withdraw.add_argument("--seq", required=True, type=int)
    withdraw.add_argument("--operator", required=True)
    withdraw.add_argument("--reason", required=True)
    withdraw.add_argument("--wait", type=float, default=30.0)
    unblind = sub.add_parser("unblind", help="let a blinded cohort's group names be shown")
    add_db_argument(unblind)
    unblind.add_argument("--cohort", required=True)
    unblind.add_argument("--operator", required=True)
    unblind.add_argument("--reason", required=True)
    unblind.add_argument("--wait", type=float, default=30.0)


_OPTIONS = (("time", "--time"), ("control session", "--control-session"), ("session", "--session"), ("what", "--what"),
            ("operator", "--operator"), ("reason", "--reason"), ("animal", "--animal"), ("withdraw", "--seq"),
            ("cohort", "--cohort"), ("stage", "--session"))


def _usage(exc: ValueError) -> UsageError:
    text = str(exc)
    option = next((o for words, o in _OPTIONS if text.startswith(words)), "--animal")
    return UsageError(f"{option}: {text}")


def run(args: argparse.Namespace) -> int:
    return {"add": _add, "list": _list, "withdraw": _withdraw, "unblind": _unblind}[args.action](args)


def _add(args: argparse.Namespace) -> int:
    from monitor.app.commands.report import known_animal
    from monitor.app.services.effects import ADVISORY, record_manipulation

    def work(conn):
        known_animal(conn, args.animal)
        try:
            return record_manipulation(conn, animal=args.animal, duration=args.duration,
                                       role="control" if args.control else "test", what=args.what,
                                       session=args.session, control_session=args.control_session,
                                       group=args.group, operator=args.operator, reason=args.reason,
                                       time=args.time)
        except ValueError as exc:
            raise _usage(exc) from None

    entry = write_transaction(args.db, args.wait, work)
    m, stage = entry.manipulation, entry.manipulation.stage_data()
    fraction = "not known" if stage.get("slow_estimate") is None else \
        f"{stage['slow_estimate']:.2f} [{stage['slow_low']:.2f}, {stage['slow_high']:.2f}] ({stage['slow_status']})"
    group = m.group or (f"code {m.group_code}" if m.group_code else "no group")
    print(f"entry {entry.seq}: {m.animal} {m.duration} {m.role} '{m.what}' from session {args.session}, {group}; "
          f"stage at session {stage.get('session')}: slow-state fraction {fraction}, "
          f"{stage.get('sessions_since_plateau')} sessions since plateau. Hash {entry.hash}")
    print(ADVISORY)
    return 0


def _list(args: argparse.Namespace) -> int:
    from monitor.app.commands.report import open_readonly
    from monitor.store.manipulations import entries, verify

    conn = open_readonly(args.db)
    try:
        logged, broken = entries(conn, args.animal), verify(conn)
    finally:
        conn.close()
    if args.json:
        print(json.dumps({"chain": broken or "ok", "entries": [{**e.content(), "hash": e.hash} for e in logged]},
                         indent=1))
    else:
        for e in logged:
            m = e.manipulation
            what = f"withdraws entry {m.withdraws}: {m.reason}" if m.withdraws else \
                f"{m.duration} {m.role} '{m.what}' (session id {m.session_id}), {m.group or m.group_code or '-'}"
            print(f"{e.seq}\t{m.time}\t{m.animal}\t{what}\t{m.operator}")
        print("chain: " + (broken or "ok"))
    if broken:
        sys.stderr.write(f"rigside manipulation: the manipulation log is broken: {broken}\n")
        return 1
    return 0


def _withdraw(args: argparse.Namespace) -> int:
    from monitor.app.services.effects import withdraw_manipulation

    def work(conn):
        try:
            return withdraw_manipulation(conn, args.seq, args.operator, args.reason)
        except ValueError as exc:
            raise _usage(exc) from None

    entry = write_transaction(args.db, args.wait, work)
    print(f"entry {entry.seq}: withdraws entry {args.seq}. Hash {entry.hash}")
    return 0


def _unblind(args: argparse.Namespace) -> int:
    from monitor.app.services.effects import unblind

    def work(conn):
        try:
            unblind(conn, args.cohort, args.operator, args.reason)
        except ValueError as exc:
            raise _usage(exc) from None

    write_transaction(args.db, args.wait, work)
    sys.stderr.write(f"WARNING: cohort {args.cohort!r} is unblinded: `rigside effects` and the window now show "
                     "its group names (where the key file beside the database can be read).\n")
    return 0
