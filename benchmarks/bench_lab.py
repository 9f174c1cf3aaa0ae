"""Lab store figures: a full sync of a cohort's store into an empty lab database, against the local import of
the same files measured in the same run, and an incremental sync of one more session (prints, never asserts).

Prints:
  history: the simulator's 8 animals x 30 days (python -m mock_rig history), the time it took
  local import: `rigside import --no-fit` of every file (events stored, trials derived, report cached; the
  consolidation fits are left out: they are analysis, not moving data, and would only flatter the ratio)
  full sync: `rigside sync` of that store into an empty lab schema, rows sent, rows/s, ratio to the import
  re-sync with nothing new, and the incremental sync of one more session (goal <= 1 s)
  report from the lab for one animal, and for every animal
  the window's read-only page of one animal from the lab, against the same page from the local store

Needs a PostgreSQL server: --lab URL (default $RIGSIDE_TEST_PG, else postgresql://postgres@127.0.0.1:5432/test);
the benchmark works in a schema of its own and drops it at the end. Run:
  python benchmarks/bench_lab.py [--animals 8] [--days 30] [--lab URL] [--dir FOLDER]
"""

from __future__ import annotations

import argparse
import os
import subprocess
import sys
import tempfile
import time
import uuid
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def rigside(*args: object) -> tuple[float, str]:
    """Run the CLI as a person would; (seconds, stdout)."""
    began = time.perf_counter()
    done = subprocess.run([sys.executable, "-m", "monitor.app", *map(str, args)], capture_output=True, text=True,
                          cwd=ROOT)
    took = time.perf_counter() - began
    if done.returncode != 0:
        raise SystemExit(f"bench_lab: rigside {args[0]} failed: {done.stderr.strip()}")
    return took, done.stdout.strip()


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--animals", type=int, default=8)
    parser.add_argument("--days", type=int, default=30)
    parser.add_argument("--lab", default=os.environ.get("RIGSIDE_TEST_PG", "postgresql://postgres@127.0.0.1:5432/test"))
    parser.add_argument("--dir", type=Path, default=None, help="work folder (default: a temporary one)")
    args = parser.parse_args()

    import psycopg

    schema = f"rigside_bench_{uuid.uuid4().hex[:8]}"
    admin = psycopg.connect(args.lab, autocommit=True)
    admin.execute(f"CREATE SCHEMA {schema}")
    url = f"{args.lab}{'&' if '?' in args.lab else '?'}options=-csearch_path%3D{schema}"
    try:
        with tempfile.TemporaryDirectory(dir=args.dir) as work:
            run(Path(work), url, args.animals, args.days)
    finally:
        admin.execute(f"DROP SCHEMA {schema} CASCADE")
        admin.close()


def run(work: Path, url: str, animals: int, days: int) -> None:
    history = work / "history"
    began = time.perf_counter()
    subprocess.run([sys.executable, "-m", "mock_rig", "history", "--animals", str(animals), "--days", str(days),
                    "--seed", "1", "--out", str(history)], check=True, capture_output=True, cwd=ROOT)
    print(f"history: {animals} animals x {days} days in {time.perf_counter() - began:.1f} s")
    names = sorted(p.name.split(".")[0] for p in history.glob("*.protocol.toml"))
    held = sorted(history.glob(f"{names[0]}_s*.rsw"))[-1]  # one session kept back for the incremental sync
    db = work / "pc.sqlite3"
    imported = 0.0
    for name in names:
        files = [f for f in sorted(history.glob(f"{name}_s*.rsw")) if f != held]
        took, _ = rigside("import", *files, "--protocol", history / f"{name}.protocol.toml", "--db", db, "--no-fit")
        imported += took
    import sqlite3
    with sqlite3.connect(db) as conn:
        events = conn.execute("SELECT count(*) FROM events").fetchone()[0]
        trials = conn.execute("SELECT count(*) FROM trials").fetchone()[0]
    print(f"local import (events, trials, report cache; no fits): {imported:.1f} s for {events} events, "
          f"{trials} trials")
    print(f"  lab schema: {rigside('lab', 'init', '--lab', url)[1]}")
    full, out = rigside("sync", "--db", db, "--lab", url, "--pc-name", "bench-pc")
    print(f"full sync into an empty lab: {full:.1f} s ({events / full:.0f} events/s); "
          f"{full / imported:.2f}x the local import (goal <= 2x)")
    print(f"  {out}")
    again, out = rigside("sync", "--db", db, "--lab", url)
    print(f"re-sync, nothing new: {again:.2f} s ({out.split(':')[-1].strip()})")
    rigside("import", held, "--animal", names[0], "--protocol", history / f"{names[0]}.protocol.toml", "--db", db,
            "--no-fit")
    from monitor.store.db import open_store
    from monitor.store.lab_sync import sync
    conn = open_store(db)
    began = time.perf_counter()
    result = sync(conn, url)
    inside = time.perf_counter() - began
    conn.close()
    print(f"incremental sync of one more session: {inside:.2f} s inside the sync call (goal <= 1 s), "
          f"{result.total} rows ({result.sent.get('events', 0)} events, {result.sent.get('trials', 0)} trials)")
    took, _ = rigside("report", "--lab", url, "--animal", names[0], "--json")
    local, _ = rigside("report", "--db", db, "--animal", names[0], "--json")
    print(f"report of one animal: from the lab {took:.2f} s, from the local store {local:.2f} s (whole command)")
    took, _ = rigside("report", "--lab", url, "--json")
    print(f"report of every animal from the lab: {took:.2f} s")
    page(db, url, names[0])


def page(db: Path, url: str, animal: str) -> None:
    """The window's read-only page of one animal from the lab (the worker thread's whole read), against the
    same page built from the local store; each twice, to see the spread."""
    os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")
    from datetime import datetime

    from monitor.app.window.lab_pages import ReadJob, page_from_store, read_page
    from monitor.core.care.ledger import CareConfig

    now = datetime.now().astimezone()
    for attempt in (1, 2):
        began = time.perf_counter()
        read_page(url, animal, CareConfig(), now)
        lab = time.perf_counter() - began
        began = time.perf_counter()
        page_from_store(db, animal, CareConfig(), now, ReadJob(lambda: False))
        local = time.perf_counter() - began
        print(f"page of one animal, read {attempt}: from the lab {lab:.2f} s (copy and build, in the window's "
              f"worker thread), from the local store {local:.2f} s ({lab / local:.1f}x)")


if __name__ == "__main__":
    main()
