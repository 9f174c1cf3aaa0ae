"""`rigside report --db DB [--animal NAME] --json`: the per-animal summary (docs/cli.md).

Rule: read-only and fast: stored trials and the cached consolidation fit,
never a refit (monitor.store.reporting). An animal the store does not know is
refused (one line, exit 2). Without `--json` a short table per animal is
printed for a person; `--json` prints the contract's document on stdout.
`--lab URL` reads the lab database instead (monitor.store.lab_read: the same
report code over a copy of the animal's rows).
"""

from __future__ import annotations

import argparse
import json

from monitor.app.errors import UsageError
from monitor.app.lab_access import add_lab_argument, lab_call
from monitor.app.paths import add_db_argument, resolve_db


def add_arguments(parser: argparse.ArgumentParser) -> None:
    add_db_argument(parser)
    parser.add_argument("--animal", help="only this animal (default: every animal)")
    parser.add_argument("--json", action="store_true", help="print the report as JSON")
    add_lab_argument(parser, reader=True)


def open_readonly(db, check: bool = False):
    """A read-only connection (after SQLite's quick_check when `check`), or a one-line UsageError naming --db."""
    from monitor.store.db import StoreError, open_store

    try:
        return open_store(resolve_db(db), readonly=True, check=check)
    except StoreError as exc:
        raise UsageError(f"--db: {exc}") from None


def known_animal(conn, name: str) -> None:
    """Refuse an animal the store has never seen."""
    if conn.execute("SELECT 1 FROM animals WHERE name = ? UNION SELECT 1 FROM sessions WHERE animal = ?",
                    (name, name)).fetchone() is None:
        raise UsageError(f"--animal: no animal {name!r} in the database")


def run(args: argparse.Namespace) -> int:
    from monitor.store.reporting import report

    if args.lab is not None:
        from monitor.store.lab_read import report as lab_report
        document = lab_call(lambda: lab_report(args.lab, args.animal))
        return _print(document, args.json)
    conn = open_readonly(args.db)
    try:
        if args.animal is not None:
            known_animal(conn, args.animal)
        document = report(conn, args.animal)
    finally:
        conn.close()
    return _print(document, args.json)


def _print(document: dict, as_json: bool) -> int:
    from monitor.core.consolidation.words import fraction_text

    if as_json:
        print(json.dumps(document, indent=1))
        return 0
    for entry in document["animals"]:
        plateau = entry["plateau"]
        c = entry["consolidation"]
        count = len(entry["sessions"])
        print(f"{entry['animal']}: {entry['protocol']}, {count} {'session' if count == 1 else 'sessions'}; plateau "
              + (f"at session {plateau['session']}" if plateau["reached"] else "not reached")
              + f"; slow-state fraction {fraction_text(c['estimate'], c['low'], c['high'], c['status'])}")
        for s in entry["sessions"]:
            rate = "-" if s["hit_rate"] is None else f"{s['hit_rate']:.2f}"
            flag = f"  EXCLUDED: {s['exclusion_reason']}" if s["excluded"] else ""
            cv = "-" if s.get("cv") is None else f"{s['cv']:.3f}"
            print(f"  {s['index']:3d} {s['start']}  stage {s.get('stage') or '-'}  {s['trials']:5d} trials  "
                  f"{s['hits']:5d} hits  hit rate {rate}  CV {cv}{flag}")
    return 0
