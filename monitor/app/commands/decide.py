"""`rigside decide --db DB --animal NAME --decision eligible|assigned|deferred|excluded [--group NAME]
--operator NAME --reason TEXT`: record a person's decision in the hash-chained log.

Rule: the person decides. The animal's figures are taken from the same data
as `rigside report` (stored trials, cached consolidation fit), turned into
`AnimalFigures`, and judged by the eligibility rule of the protocol in force
(its `[eligibility]` table); the figures and the rule's verdict are frozen in
the entry, and an entry that disagrees with the rule is recorded with both.
A protocol without a rule gives the verdict "no eligibility rule" (nothing to
disagree with). In a blinded cohort `--group` takes a group code and only the
code is recorded; a random draw is `rigside assign`. An unknown animal, a bad value (decision, date, group for an
assignment, a correction of an entry that does not exist) is refused with one
line and exit 2; nothing is written then. The entry is appended in one
`BEGIN IMMEDIATE` transaction, waiting up to `--wait` seconds for another
writer. Prints the entry's seq, the rule's state and whether it disagrees.
These figures are advisory: the approved animal-use protocol, the
animal-care committee and the veterinarian decide.
"""

from __future__ import annotations

import argparse
from monitor.app.errors import UsageError
from monitor.app.paths import add_db_argument
from monitor.app.store_access import write_transaction

def add_arguments(parser: argparse.ArgumentParser) -> None:
    add_db_argument(parser)
    parser.add_argument("--animal", required=True)
    parser.add_argument("--decision", required=True, choices=("eligible", "assigned", "deferred", "excluded"))
    parser.add_argument("--group", help="the experimental group (needed for assigned); its code when blinded")
    parser.add_argument("--operator", required=True, help="who decides")
    parser.add_argument("--reason", required=True, help="why, in a sentence")
    parser.add_argument("--planned", help="the planned manipulation (e.g. 'muscimol M1 0.5 µl')")
    parser.add_argument("--planned-date", help="its planned date (ISO date or date-time with offset)")
    parser.add_argument("--corrects", type=int, metavar="SEQ", help="this entry corrects entry SEQ")
    parser.add_argument("--method", help="assignment method (e.g. cohort-sha256-v1), with --seed")
    parser.add_argument("--seed", type=int, help="assignment seed, with --method")
    parser.add_argument("--wait", type=float, default=30.0, help="seconds to wait for another writer (default 30)")


def run(args: argparse.Namespace) -> int:
    entry, verdict = write_transaction(args.db, args.wait, lambda conn: _decide(conn, args))
    d = entry.decision
    agree = "disagrees with the rule (both recorded)" if d.disagrees_with_rule else "agrees with the rule"
    if verdict is None:
        agree = "no rule to compare with"
    print(f"entry {entry.seq}: {d.animal} {d.decision}{' to ' + d.group if d.group else ''} by {d.operator}; "
          f"rule: {d.rule_state}; {agree}. Hash {entry.hash}")
    return 0


def _decide(conn, args):
    from monitor.app.services.judging import RuleError, judge, record_decision
    from monitor.app.commands.report import known_animal

    known_animal(conn, args.animal)
    try:
        judgement = judge(conn, args.animal)
    except RuleError as exc:
        raise UsageError(f"--animal: {exc}") from None
    if judgement is None:
        raise UsageError(f"--animal: {args.animal!r} has no session with a protocol yet; nothing to decide on")
    try:
        logged = record_decision(conn, judgement, decision=args.decision, operator=args.operator, reason=args.reason,
                                 group=args.group, planned_manipulation=args.planned, planned_date=args.planned_date,
                                 assignment_method=args.method, assignment_seed=args.seed, corrects=args.corrects)
    except ValueError as exc:
        raise UsageError(f"{_option(str(exc))}: {exc}") from None
    return logged, (None if judgement.rule is None else judgement.verdict)


def _option(message: str) -> str:
    """The command-line option a core ValueError is about."""
    for words, option in (("names a group", "--group"), ("has no group", "--group"), ("blinded", "--group"), ("planned_date", "--planned-date"),
                          ("planned_manipulation", "--planned"), ("assignment", "--method/--seed"),
                          ("corrects", "--corrects"), ("entry ", "--corrects"), ("operator", "--operator"),
                          ("reason", "--reason"), ("figures are for", "--animal"), ("animal", "--animal")):
        if words in message:
            return option
    return "--decision"
