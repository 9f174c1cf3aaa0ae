"""A cohort's first consolidation fits: one process after another against one process per core.

Writes an 8-animal x 30-day `mock_rig history` cohort, imports it without fits
into a temporary store, then fits every animal from no cached fit (a fresh copy
of the store for each run): once with one child process (the fits one after
another: their sum), once with `refit_in_process`'s default (one child per core,
one BLAS thread each), the two alternating ``--repeats`` times so that both see
the same load.  Per run it prints the wall time, the CPU seconds of its child
processes and the load average before it; per pair the ratio parallel / serial
(goal on 2 cores: <= 0.6) and their median; and the schedule's own bound: the
wall time the shared queue would give if every animal took its serial time
(what the ratio would be on an otherwise idle machine), against which the
measured ratio shows what the machine's other load took.
Run: python benchmarks/bench_cohort_fits.py [--animals 8 --days 30 --seed 5 --repeats 2]
"""
from __future__ import annotations

import argparse
import heapq
import os
import shutil
import statistics
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


def timed_run(db: Path, names: list[str], workers: int, folder: Path,
              tag: str) -> tuple[float, float, dict[str, float]]:
    """Wall time of fitting `names` from a fresh copy of the store (no cached fit), the CPU seconds of the
    child processes, and each animal's time."""
    copy = folder / f"{tag}.sqlite3"
    shutil.copy(db, copy)
    cpu = _children_cpu()
    started, done = time.perf_counter(), {}
    last = [started]

    def finished(animal: str, block: dict | None, error: str | None) -> None:
        now = time.perf_counter()
        done[animal] = now - last[0] if workers == 1 else now - started
        last[0] = now
        if block is None:
            print(f"  {animal}: failed ({error})", file=sys.stderr)

    refit_in_process(copy, names, finished=finished, workers=workers)
    wall = time.perf_counter() - started
    return wall, _children_cpu() - cpu, done


def _children_cpu() -> float:
    """CPU seconds of this process's finished child processes (NaN where the platform does not say)."""
    try:
        import resource  # POSIX only
    except ImportError:
        return float("nan")
    usage = resource.getrusage(resource.RUSAGE_CHILDREN)
    return usage.ru_utime + usage.ru_stime


def queue_bound(times: list[float], workers: int) -> float:
    """Wall time of a shared queue (each worker takes the next item when free) if item i took times[i]."""
    free = [0.0] * workers
    for seconds in times:
        heapq.heappush(free, heapq.heappop(free) + seconds)
    return max(free)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--animals", type=int, default=8)
    parser.add_argument("--days", type=int, default=30)
    parser.add_argument("--seed", type=int, default=5)
    parser.add_argument("--repeats", type=int, default=2, help="serial/parallel pairs, alternating")
    args = parser.parse_args()
    ratios, bounds = [], []
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        db, names = make_store(folder, args.animals, args.days, args.seed)
        cores = worker_count(len(names))
        print(f"{len(names)} animals x {args.days} days (mock_rig history, seed {args.seed}); {os.cpu_count()} cores")
        for run in range(args.repeats):
            load = os.getloadavg()[0]
            serial, serial_cpu, each = timed_run(db, names, 1, folder, f"serial{run}")
            print(f"run {run + 1}: serial, one child process (load {load:.1f}): {serial:.2f} s wall, "
                  f"{serial_cpu:.2f} s CPU; per animal (s): " + ", ".join(f"{each[n]:.2f}" for n in names))
            load = os.getloadavg()[0]
            parallel, parallel_cpu, ends = timed_run(db, names, cores, folder, f"parallel{run}")
            print(f"run {run + 1}: parallel, {cores} child processes, one BLAS thread each (load {load:.1f}): "
                  f"{parallel:.2f} s wall, {parallel_cpu:.2f} s CPU; animals done at (s): "
                  + ", ".join(f"{ends[n]:.2f}" for n in sorted(names, key=ends.get)))
            bound = queue_bound([each[n] for n in names], cores) / serial
            ratios.append(parallel / serial)
            bounds.append(bound)
            print(f"run {run + 1}: ratio parallel / serial {ratios[-1]:.2f}; the queue's bound with the serial "
                  f"per-animal times {bound:.2f}")
    print(f"ratio parallel / serial: median {statistics.median(ratios):.2f} over {len(ratios)} pairs "
          f"({', '.join(f'{r:.2f}' for r in ratios)}); goal <= 0.6 on 2 cores; the queue's bound "
          + ", ".join(f"{b:.2f}" for b in bounds))


if __name__ == "__main__":
    main()
