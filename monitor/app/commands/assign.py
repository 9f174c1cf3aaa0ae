"""`rigside assign --animal NAME | --animals NAME... --operator NAME --reason TEXT`: random assignment
to the cohort's groups, recorded in the decision log; `rigside assign --reveal-key --cohort NAME`.

Rule: the group is drawn by `monitor.app.services.assigning` (the same function as the
window's "Draw the group at random") and never from the animal's figures:
`--animal` draws the next entry of the cohort's permuted blocks
(blocks-sha256-v1), `--animals` deals a listed set at once (cohort-sha256-v1),
as the protocol's `[eligibility] assignment` says. The cohort's plan and seed
are recorded the first time; each animal gets an `assigned` entry with the
method and seed, through the same `record_decision` as `rigside decide`, all
in one BEGIN IMMEDIATE transaction. In a blinded cohort only codes are
printed and recorded. `--reveal-key` prints the group <-> code table with a
warning, for whoever holds the blind. Unknown animal, an animal already
assigned, a cohort without groups, a plan the rule no longer matches: one
line, exit 2, nothing recorded. Advisory: the approved animal-use protocol,
the animal-care committee and the veterinarian decide.
"""

from __future__ import annotations

import argparse
import sys

from monitor.app.errors import UsageError
from monitor.app.paths import add_db_argument, resolve_db
from monitor.app.store_access import write_transaction

CAUTION = ("Advisory: the approved animal-use protocol, the animal-care committee and the veterinarian decide; "
           "follow local rules.")


def add_arguments(parser: argparse.ArgumentParser) -> None:
    add_db_argument(parser)
    which = parser.add_mutually_exclusive_group(required=True)
    which.add_argument("--animal", help="draw this animal's group (the next of the cohort's blocks)")
    which.add_argument("--animals", nargs="+", metavar="NAME", help="deal these animals of one cohort at once")
    which.add_argument("--reveal-key", action="store_true", help="print a blinded cohort's group <-> code table")
    parser.add_argument("--cohort", help="with --reveal-key: the cohort")
    parser.add_argument("--operator", help="who assigns (required to assign)")
    parser.add_argument("--reason", help="why now, in a sentence (required to assign)")
    parser.add_argument("--planned", help="with --animal: the planned manipulation")
    parser.add_argument("--planned-date", help="with --animal: its planned date (ISO date)")
    parser.add_argument("--wait", type=float, default=30.0, help="seconds to wait for another writer (default 30)")


def run(args: argparse.Namespace) -> int:
    if args.reveal_key:
        return _reveal(args)
    for option, value in (("--operator", args.operator), ("--reason", args.reason)):
        if not value or not value.strip():
            raise UsageError(f"{option}: needed to assign")
    done = write_transaction(args.db, args.wait, lambda conn: _assign(conn, args))
    for draw, entry in done:
        d = entry.decision
        shown = f"group code {draw.group} (blinded)" if draw.blinded else draw.group
        agree = "disagrees with the rule (both recorded)" if d.disagrees_with_rule else "agrees with the rule"
        print(f"entry {entry.seq}: {d.animal} assigned to {shown} by {d.operator}; {draw.method} seed {draw.seed}, "
              f"animal {draw.position + 1} of cohort {draw.cohort!r}; rule: {d.rule_state}; {agree}. "
              f"Hash {entry.hash}")
    print(CAUTION)
    return 0


def _assign(conn, args) -> list:
    from monitor.app.services.assigning import AssignError, assign_listed, draw_next, record_draw

    names = [args.animal] if args.animal else list(args.animals)
    option = "--animal" if args.animal else "--animals"
    if len(set(names)) != len(names):
        raise UsageError(f"{option}: an animal is listed twice")
    judgements = [_judgement(conn, name, option) for name in names]
    try:
        if args.animal:
            draw = draw_next(conn, judgements[0])
            return [(draw, record_draw(conn, judgements[0], draw, operator=args.operator, reason=args.reason,
                                       planned_manipulation=args.planned, planned_date=args.planned_date))]
        return assign_listed(conn, judgements, operator=args.operator, reason=args.reason)
    except AssignError as exc:
        raise UsageError(f"{option}: {exc}") from None
    except ValueError as exc:
        from monitor.app.commands.decide import _option

        raise UsageError(f"{_option(str(exc))}: {exc}") from None


def _judgement(conn, name: str, option: str):
    from monitor.app.services.judging import RuleError, judge
    from monitor.app.commands.report import known_animal

    try:
        known_animal(conn, name)
    except UsageError as exc:
        raise UsageError(str(exc).replace("--animal:", f"{option}:", 1)) from None
    try:
        judgement = judge(conn, name)
    except RuleError as exc:
        raise UsageError(f"{option}: {exc}") from None
    if judgement is None:
        raise UsageError(f"{option}: {name!r} has no session with a protocol yet; nothing to assign")
    return judgement


def _reveal(args: argparse.Namespace) -> int:
    from monitor.app.services.blinding import BlindingError, key_file, read_key

    if not args.cohort:
        raise UsageError("--cohort: say which cohort's key to reveal")
    path = key_file(resolve_db(args.db), args.cohort)
    if not path.exists():
        raise UsageError(f"--cohort: no blinding key for cohort {args.cohort!r} ({path} does not exist)")
    try:
        _, groups, key = read_key(path)
    except BlindingError as exc:
        raise UsageError(f"--cohort: {exc}") from None
    sys.stderr.write(f"WARNING: this unblinds cohort {args.cohort!r}. Show it only to whoever holds the blind, "
                     "and note in the lab book who saw it and when.\n")
    for group in groups:
        print(f"{key.code_of(group)}\t{group}")
    print(f"key file: {path}")
    return 0
