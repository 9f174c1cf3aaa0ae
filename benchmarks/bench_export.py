"""Benchmark: the exports of a simulated cohort (NWB and both CSVs) beside a plain yardstick, in one run.

Writes `python -m mock_rig history` (8 animals x 30 days, seed 11: bench_cohort's
cohort), imports it with `rigside import --no-fit` and fills the subject records
from the history's animals.sh. Then, each in a child process as a user runs it:
the NWB export with one process (`--jobs 1`) and with one per core (twice, for
the spread), and the events and trials CSVs with their rows per second and the
command's peak memory. Every time is printed beside the yardstick measured in
the same run (bench_cohort.yardstick: read, split and insert the same files
into SQLite) and their ratio, with the load average. Run:
    python benchmarks/bench_export.py [--animals 8] [--days 30] [--seed 11]
"""

from __future__ import annotations

import argparse
import os
import shlex
import sqlite3
import subprocess
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))  # run as a script from a checkout

from benchmarks.bench_cohort import ROOT, import_cohort, yardstick  # noqa: E402 - after the path

PEAK = ("import resource, sys; from monitor.app.cli import main; code = main(sys.argv[1:]); "
        "print('peak', resource.getrusage(resource.RUSAGE_SELF).ru_maxrss, file=sys.stderr); sys.exit(code)")


def command(*argv: object) -> tuple[float, float]:
    """(seconds, peak resident MB) of one `rigside` command in a child process; its failure ends the benchmark."""
    env = {**os.environ, "PYTHONPATH": os.pathsep.join(filter(None, [str(ROOT), os.environ.get("PYTHONPATH")]))}
    started = time.perf_counter()
    done = subprocess.run([sys.executable, "-c", PEAK, *map(str, argv)], cwd=ROOT, env=env, capture_output=True,
                          text=True)
    seconds = time.perf_counter() - started
    if done.returncode != 0:
        raise RuntimeError(f"rigside {' '.join(map(str, argv[:2]))} exited {done.returncode}: {done.stderr[-300:]}")
    peak_kb = int(done.stderr.rsplit("peak ", 1)[1].split()[0])
    return seconds, peak_kb / (1024 if sys.platform == "darwin" else 1) / 1024


def run(animals: int, days: int, seed: int) -> None:
    with tempfile.TemporaryDirectory(prefix="bench_export_") as folder:
        root = Path(folder)
        history = root / "h"
        subprocess.run([sys.executable, "-m", "mock_rig", "history", "--animals", str(animals), "--days", str(days),
                        "--seed", str(seed), "--out", str(history)], cwd=ROOT, check=True, capture_output=True)
        db = root / "store.sqlite3"
        import_cohort(history, db, fit=False)
        for line in (history / "animals.sh").read_text().splitlines():
            if line.startswith("rigside "):
                command(*[str(db) if w == "$DB" else w for w in shlex.split(line)[1:]])
        with sqlite3.connect(db) as conn:
            sessions, events, trials = (conn.execute(f"SELECT count(*) FROM {t}").fetchone()[0]
                                        for t in ("sessions", "events", "trials"))
        print(f"cohort: {animals} animals x {days} days (seed {seed}): {sessions} sessions, {events:,} events, "
              f"{trials:,} trials; store {db.stat().st_size / 1e6:.1f} MB; {os.cpu_count()} cores; "
              f"load {os.getloadavg()[0]:.2f}")
        yard_s, _ = yardstick(sorted(history.glob("*.rsw")), root / "yardstick.sqlite")
        print(f"yardstick (read, split, insert the same files): {yard_s:.2f} s")

        for label, jobs in (("one process", 1), ("one per core", 0), ("one per core, again", 0)):
            out = root / f"nwb-{jobs}-{label[-5:]}"
            seconds, peak = command("export", "--db", db, "--nwb", out, "--jobs", jobs, "--quiet")
            size = sum(p.stat().st_size for p in out.glob("*.nwb"))
            print(f"NWB, {label}: {seconds:.2f} s = {seconds / yard_s:.1f} x the yardstick (goal <= 3); "
                  f"{seconds / sessions * 1000:.0f} ms a session; {size / 1e6:.1f} MB, NWB / store "
                  f"{size / db.stat().st_size:.2f} (goal <= 1.5); main process peak {peak:.0f} MB; "
                  f"load {os.getloadavg()[0]:.2f}")
        for what, rows in (("events", events), ("trials", trials)):
            seconds, peak = command("export", what, "--db", db, "--csv", root / f"{what}.csv")
            print(f"{what} CSV: {seconds:.2f} s = {seconds / yard_s:.1f} x the yardstick; {rows / seconds:,.0f} "
                  f"rows/s with start-up{' (goal >= 300,000)' if what == 'events' else ''}; "
                  f"{(root / f'{what}.csv').stat().st_size / 1e6:.1f} MB; peak {peak:.0f} MB; "
                  f"load {os.getloadavg()[0]:.2f}")
        yard_again, _ = yardstick(sorted(history.glob("*.rsw")), root / "yardstick-again.sqlite")
        print(f"yardstick again: {yard_again:.2f} s (the spread of the machine during the run)")


def cli() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--animals", type=int, default=8)
    parser.add_argument("--days", type=int, default=30)
    parser.add_argument("--seed", type=int, default=11)
    args = parser.parse_args()
    run(args.animals, args.days, args.seed)


if __name__ == "__main__":
    cli()
