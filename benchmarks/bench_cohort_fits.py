"""A cohort's first consolidation fits: one process after another against one process per core.

Writes an 8-animal x 30-day `mock_rig history` cohort, imports it without fits
into a temporary store, then fits every animal from no cached fit (a fresh copy
of the store for each run): once with one child process (the fits one after
another: their sum), once with `refit_in_process`'s default (one child per core,
one BLAS thread each).  Prints both wall times, the per-animal times of the
serial run, and the ratio parallel / serial (goal on 2 cores: <= 0.6).
Run: python benchmarks/bench_cohort_fits.py [--animals 8 --days 30 --seed 5]
"""
from __future__ import annotations

import argparse
import os
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

from monitor.store.consolidation_fits import refit_in_process, worker_count


def make_store(folder: Path, animals: int, days: int, seed: int) -> tuple[Path, list[str]]:
    """The cohort's files imported (no fits) into folder/store.sqlite3; the animals' names."""
    out = folder / "history"
    subprocess.run([sys.executable, "-m", "mock_rig", "history", "--animals", str(animals), "--days", str(days),
                    "--seed", str(seed), "--out", str(out)], check=True, capture_output=True)
    db = folder / "store.sqlite3"
    names = sorted({p.name.split("_s")[0] for p in out.glob("*.rsw")})
    for name in names:
        files = sorted(str(p) for p in out.glob(f"{name}_s*.rsw"))
        subprocess.run([sys.executable, "-m", "monitor.app", "import", *files, "--protocol",
                        str(out / f"{name}.protocol.toml"), "--db", str(db), "--no-fit"], check=True,
                       capture_output=True)
    return db, names


def timed_run(db: Path, names: list[str], workers: int, folder: Path, tag: str) -> tuple[float, dict[str, float]]:
    """Wall time of fitting `names` from a fresh copy of the store (no cached fit), and each animal's time."""
    copy = folder / f"{tag}.sqlite3"
    shutil.copy(db, copy)
    started, done = time.perf_counter(), {}
    last = [started]

    def finished(animal: str, block: dict | None, error: str | None) -> None:
        now = time.perf_counter()
        done[animal] = now - last[0] if workers == 1 else now - started
        last[0] = now
        if block is None:
            print(f"  {animal}: failed ({error})", file=sys.stderr)

    refit_in_process(copy, names, finished=finished, workers=workers)
    return time.perf_counter() - started, done


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--animals", type=int, default=8)
    parser.add_argument("--days", type=int, default=30)
    parser.add_argument("--seed", type=int, default=5)
    args = parser.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        db, names = make_store(folder, args.animals, args.days, args.seed)
        cores = worker_count(len(names))
        serial, each = timed_run(db, names, 1, folder, "serial")
        parallel, ends = timed_run(db, names, cores, folder, "parallel")
    print(f"{len(names)} animals x {args.days} days (mock_rig history, seed {args.seed}); "
          f"{os.cpu_count()} cores, load {os.getloadavg()[0]:.1f}")
    print("serial, one child process, per animal (s): " + ", ".join(f"{each[n]:.2f}" for n in names))
    print(f"serial (the sum of the single fits): {serial:.2f} s")
    print(f"parallel, {cores} child processes, one BLAS thread each: {parallel:.2f} s; animals done at (s): "
          + ", ".join(f"{ends[n]:.2f}" for n in sorted(names, key=ends.get)))
    print(f"ratio parallel / serial: {parallel / serial:.2f} (goal <= 0.6 on 2 cores)")


if __name__ == "__main__":
    main()
