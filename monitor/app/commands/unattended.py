"""`rigside unattended list|give --db DB ...`: a box's runs with nobody checked in, given to an animal afterwards.

Rule: a box that streamed while nobody was checked in leaves its presses in a
run of no animal. `list` prints each ended or running run that has presses
(box, start time, presses or trials). `give --rig NAME --started TIME
--animal NAME --operator NAME --reason TEXT [--protocol FILE] [--stage NAME]`
gives the one ended run of that box that started at TIME (local
"YYYY-MM-DD HH:MM", seconds optional) to the animal: its trials are derived
with the protocol given, else the animal's latest one; the change is logged
with the operator and reason. A run is given once. Bad input (no such run,
several runs at that minute, a run still going, a missing reason or
protocol): one line, exit 2, nothing written.
"""

from __future__ import annotations

import argparse
from pathlib import Path

from monitor.app.errors import UsageError
from monitor.app.paths import add_db_argument
from monitor.app.store_access import write_transaction

WAIT_S = 30.0


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("action", choices=("list", "give"))
    add_db_argument(parser)
    parser.add_argument("--rig", help="the box (list: only this box)")
    parser.add_argument("--started", help='give: the run\'s local start time, "YYYY-MM-DD HH:MM" as listed')
    parser.add_argument("--animal", help="give: the animal that was in the box")
    parser.add_argument("--operator", help="give: who gives the run")
    parser.add_argument("--reason", help="give: how you know it was this animal")
    parser.add_argument("--protocol", type=Path, help="give: protocol file (default: the animal's latest)")
    parser.add_argument("--stage", help="give: the stage in force (default: the box's own word, else none)")


def run(args: argparse.Namespace) -> int:
    if args.action == "list":
        runs = write_transaction(args.db, WAIT_S, lambda conn: _runs(conn, args.rig))
        if not runs:
            print("No box has run with nobody checked in.")
        for r in runs:
            state = "ended" if r.ended else "still running"
            print(f"{r.rig}  started {_minute(r.start)}  {state}  {r.presses} presses or trials")
        return 0
    for option in ("rig", "started", "animal", "operator", "reason"):
        if not (getattr(args, option) or "").strip():
            raise UsageError(f"--{option}: needed to give a run")
    from monitor.app.commands.record import _read_protocol

    protocol = _read_protocol(args.protocol) if args.protocol else None
    trials = write_transaction(args.db, WAIT_S, lambda conn: _give(conn, args, protocol))
    print(f"{trials} trials from {args.rig} (started {args.started}) given to {args.animal}; logged.")
    return 0


def _minute(start: str) -> str:
    return start[:19].replace("T", " ")


def _runs(conn, rig: str | None):
    from monitor.store.session_changes import unattended_runs

    return unattended_runs(conn, rig)


def _give(conn, args, protocol: dict | None) -> int:
    from monitor.store.registry import RecordError, ensure_protocol
    from monitor.store.session_changes import give_run, latest_protocol_id

    wanted = args.started.strip().replace("T", " ")
    matches = [r for r in _runs(conn, args.rig) if _minute(r.start).startswith(wanted)]
    if not matches:
        raise UsageError(f"--started: {args.rig} has no run with nobody checked in that started at {wanted} "
                         "(see rigside unattended list)")
    if len(matches) > 1:
        raise UsageError(f"--started: {len(matches)} runs of {args.rig} started at {wanted}; give the seconds too")
    if protocol is not None:
        protocol_id = ensure_protocol(conn, protocol["name"], protocol["version"], protocol["text"])
    else:
        protocol_id = latest_protocol_id(conn, args.animal.strip())
        if protocol_id is None:
            raise UsageError(f"--protocol: {args.animal} has no session with a protocol yet; give the protocol file")
    try:
        return give_run(conn, matches[0].session_id, animal=args.animal, operator=args.operator,
                        reason=args.reason, protocol_id=protocol_id, stage=args.stage)
    except RecordError as exc:
        raise UsageError(str(exc)) from None
