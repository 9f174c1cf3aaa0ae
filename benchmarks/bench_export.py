"""Benchmark: export of the simulated cohort's history to NWB and CSV; the NWB/SQLite size ratio (goal <= 1.5).

Writes `python -m mock_rig history` (8 animals x 30 days by default), imports it
with `rigside import --no-fit`, fills the subject records from the history's
animals.sh, then times `rigside export --nwb` and both CSV exports and prints
sizes: the store, the NWB folder, their ratio, and the CSVs. Run:
    python benchmarks/bench_export.py [--animals 8] [--days 30] [--seed 3]
"""

from __future__ import annotations

import argparse
import contextlib
import io
import shlex
import tempfile
import time
from pathlib import Path

from mock_rig.history import cohort, write_history
from monitor.app.cli import main


def quiet(*args: object) -> int:
    """Run one `rigside` command with its output swallowed; return its exit code."""
    with contextlib.redirect_stdout(io.StringIO()), contextlib.redirect_stderr(io.StringIO()):
        return main([str(a) for a in args])


def run(animals: int, days: int, seed: int) -> None:
    with tempfile.TemporaryDirectory(prefix="bench_export_") as folder:
        root = Path(folder)
        truth = write_history(root / "h", cohort(animals, seed), days)
        db = root / "store.sqlite3"
        for name in truth["animals"]:
            files = sorted((root / "h").glob(f"{name}_s*.rsw"))
            assert quiet("import", *files, "--protocol", root / "h" / f"{name}.protocol.toml", "--db", db,
                         "--no-fit") == 0
        for line in (root / "h" / "animals.sh").read_text().splitlines():
            if line.startswith("rigside "):
                quiet(*[str(db) if w == "$DB" else w for w in shlex.split(line)[1:]])
        sessions = sum(len(a["sessions"]) for a in truth["animals"].values())
        started = time.perf_counter()
        code = quiet("export", "--db", db, "--nwb", root / "nwb")
        nwb_s = time.perf_counter() - started
        nwb_bytes = sum(p.stat().st_size for p in (root / "nwb").glob("*.nwb"))
        csv_s = {}
        for what in ("events", "trials"):
            started = time.perf_counter()
            quiet("export", what, "--db", db, "--csv", root / f"{what}.csv")
            csv_s[what] = time.perf_counter() - started
        db_bytes = db.stat().st_size
        print(f"history: {animals} animals x {days} days, {sessions} sessions")
        print(f"sqlite store: {db_bytes / 1e6:.1f} MB")
        print(f"nwb export: {nwb_bytes / 1e6:.1f} MB in {nwb_s:.1f} s ({nwb_s / sessions * 1000:.0f} ms per "
              f"session, exit {code})")
        print(f"nwb/sqlite size ratio: {nwb_bytes / db_bytes:.2f} (goal <= 1.5)")
        for what in ("events", "trials"):
            size = (root / f"{what}.csv").stat().st_size
            print(f"{what} csv: {size / 1e6:.1f} MB in {csv_s[what]:.1f} s")


def cli() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--animals", type=int, default=8)
    parser.add_argument("--days", type=int, default=30)
    parser.add_argument("--seed", type=int, default=3)
    args = parser.parse_args()
    run(args.animals, args.days, args.seed)


if __name__ == "__main__":
    cli()
