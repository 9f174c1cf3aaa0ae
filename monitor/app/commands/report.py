"""`rigside report --db DB [--animal NAME] --json`: the per-animal summary of CONTRACTS.md §5.

Rule: read-only and fast: stored trials and the cached consolidation fit,
never a refit (monitor.store.reporting). An animal the store does not know is
refused (one line, exit 2). Without `--json` a short table per animal is
printed for a person; `--json` prints the contract's document on stdout.
"""

from __future__ import annotations

import argparse
import json

from monitor.app.errors import UsageError
from monitor.app.paths import add_db_argument, resolve_db


def add_arguments(parser: argparse.ArgumentParser) -> None:
    add_db_argument(parser)
    parser.add_argument("--animal", help="only this animal (default: every animal)")
    parser.add_argument("--json", action="store_true", help="print the report as JSON (CONTRACTS.md §5)")


def open_readonly(db):
    """A read-only connection, or a one-line UsageError naming --db."""
    from monitor.store.db import StoreError, open_store

    try:
        return open_store(resolve_db(db), readonly=True)
    except StoreError as exc:
        raise UsageError(f"--db: {exc}") from None


def known_animal(conn, name: str) -> None:
    """Refuse an animal the store has never seen."""
    if conn.execute("SELECT 1 FROM animals WHERE name = ? UNION SELECT 1 FROM sessions WHERE animal = ?",
                    (name, name)).fetchone() is None:
        raise UsageError(f"--animal: no animal {name!r} in the database")


def run(args: argparse.Namespace) -> int:
    from monitor.core.consolidation_words import fraction_text
    from monitor.store.reporting import report

    conn = open_readonly(args.db)
    try:
        if args.animal is not None:
            known_animal(conn, args.animal)
        document = report(conn, args.animal)
    finally:
        conn.close()
    if args.json:
        print(json.dumps(document, indent=1))
        return 0
    for entry in document["animals"]:
        plateau = entry["plateau"]
        c = entry["consolidation"]
        print(f"{entry['animal']}: {entry['protocol']}, {len(entry['sessions'])} sessions; plateau "
              + (f"at session {plateau['session']}" if plateau["reached"] else "not reached")
              + f"; slow-state fraction {fraction_text(c['estimate'], c['low'], c['high'], c['status'])}")
        for s in entry["sessions"]:
            rate = "-" if s["hit_rate"] is None else f"{s['hit_rate']:.2f}"
            flag = f"  EXCLUDED: {s['exclusion_reason']}" if s["excluded"] else ""
            print(f"  {s['index']:3d} {s['start']}  {s['trials']:5d} trials  {s['hits']:5d} hits  "
                  f"hit rate {rate}{flag}")
    return 0
