"""`rigside lab init|show|copy --lab URL` and `rigside lab status --db DB`: the lab database itself.

Rule: `init` creates the lab's schema on an empty PostgreSQL database (or
schema) and upgrades an older one (monitor.store.lab_schema, Alembic); it is
safe to run again. `show` is the read-only view of the lab: every PC, its
rigs and animals, its last sync; `--json` prints it as a document. `copy
--to FILE [--animal NAME]` writes a local store holding the lab's animals (or
one), events and all, for any local command (report, the care sheet, ...);
an existing FILE is never overwritten. `status`
reads only this PC's store: the last sync, rows waiting, and since when the
server has been unreachable. Faults as in monitor.app.lab_access.
"""

from __future__ import annotations

import argparse
import json
from pathlib import Path

from monitor.app.errors import UsageError
from monitor.app.lab_access import add_lab_argument, lab_call, resolve_lab
from monitor.app.paths import add_db_argument
from monitor.app.settings import add_settings_argument


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("action", choices=("init", "show", "copy", "status"),
                        help="init: create or upgrade the lab schema; show: what the lab holds; copy: the lab's "
                             "animals into a new local store file; status: this PC's last sync and rows waiting")
    add_lab_argument(parser)
    add_db_argument(parser)
    add_settings_argument(parser)
    parser.add_argument("--json", action="store_true", help="show/status: print a JSON document")
    parser.add_argument("--to", type=Path, help="copy: the new store file to write")
    parser.add_argument("--animal", help="copy: only this animal (the name the lab shows)")


def run(args: argparse.Namespace) -> int:
    if args.action == "status":
        return _status(args)
    url = resolve_lab(args.lab, args.settings)
    if args.action == "copy":
        if args.to is None:
            raise UsageError("--to: give the new store file to write")
        if args.to.exists():
            raise UsageError(f"--to: {args.to} exists; give a new file (nothing is overwritten)")
        if not args.to.parent.is_dir():
            raise UsageError(f"--to: {args.to.parent} is not a folder")
        return lab_call(lambda: _copy(url, args.to, args.animal))
    return lab_call(lambda: _init(url) if args.action == "init" else _show(url, args.json))


def _copy(url: str, to: Path, animal: str | None) -> int:
    from monitor.store.lab_read import copy_to

    copied = copy_to(url, to, animal)
    print(f"copied {len(copied)} animals from the lab to {to}: {', '.join(copied) or '-'}")
    return 0


def _init(url: str) -> int:
    from monitor.store.lab_schema import shown, upgrade

    before, after = upgrade(url)
    print(f"lab {shown(url)}: schema {after}" + (" (already current)" if before == after else
                                                 f" (was {before or 'empty'})"))
    return 0


def _show(url: str, as_json: bool) -> int:
    from monitor.store.lab_read import Lab

    with Lab(url) as lab:
        pcs = lab.pcs()
        animals = lab.animals()
    names = {pc["pc"]: pc["name"] for pc in pcs}
    document = {"pcs": pcs, "animals": [{"animal": a.shown, "lab_id": a.lab_id,
                                         "pcs": [names[p] for p, _ in a.places]} for a in animals]}
    if as_json:
        print(json.dumps(document, indent=1))
        return 0
    for pc in pcs:
        print(f"PC {pc['pc']} {pc['name']}: last sync {pc['last_sync'] or 'never'}; {pc['animals']} animals, "
              f"{pc['sessions']} sessions; rigs {', '.join(pc['rigs']) or '-'}")
    for entry in document["animals"]:
        print(f"  {entry['animal']}" + (f" (lab id {entry['lab_id']})" if entry["lab_id"] else "")
              + f": {', '.join(entry['pcs'])}")
    return 0


def _status(args: argparse.Namespace) -> int:
    from monitor.app.commands.report import open_readonly
    from monitor.store.lab_sync import sync_status

    conn = open_readonly(args.db)
    try:
        state = sync_status(conn)
    finally:
        conn.close()
    if args.json:
        print(json.dumps(state, indent=1))
        return 0
    print(f"last sync: {state['last_sync_at'] or 'never'}; rows waiting: {state['rows_waiting']}"
          + (f"; lab unreachable since {state['unreachable_since']} ({state['last_error']})"
             if state["unreachable_since"] else ""))
    return 0
