"""Benchmark: `python -m mock_rig history` for 8 animals x 30 days.

Prints wall time, sessions, trials, lines and bytes written, for the default
cohort (and with --animals/--days/--repeat as given). Run:
    python benchmarks/bench_history.py [--animals 8] [--days 30] [--repeat 3]
"""

from __future__ import annotations

import argparse
import json
import statistics
import tempfile
import time
from pathlib import Path

from mock_rig.history import cohort, write_history


def run_once(animals: int, days: int, seed: int) -> tuple[float, dict]:
    """Seconds for one history, and its figures (files are deleted afterwards)."""
    with tempfile.TemporaryDirectory(prefix="bench_history_") as folder:
        out = Path(folder)
        started = time.perf_counter()
        truth = write_history(out, cohort(animals, seed), days)
        seconds = time.perf_counter() - started
        files = list(out.glob("*.rsw"))
        figures = {
            "lines": sum(f.read_bytes().count(b"\n") for f in files),
            "bytes": sum(f.stat().st_size for f in files),
            "sessions": sum(len(a["sessions"]) for a in truth["animals"].values()),
            "trials": sum(s["trials"] for a in truth["animals"].values() for s in a["sessions"]),
            "truth_bytes": len(json.dumps(truth)),
        }
    return seconds, figures


def figures(quick: bool = False) -> list[tuple[str, float, str, str]]:
    """Table lines for `python -m benchmarks`: (label, value, unit, detail); one run."""
    animals, days = (2, 10) if quick else (8, 30)
    seconds, f = run_once(animals, days, 1)
    return [(f"simulator history, {animals} animals x {days} days", seconds, "s",
             f"{f['sessions']} sessions, {f['trials']:,} completed trials, {f['lines']:,} lines "
             f"({f['lines'] / seconds:,.0f} lines/s)")]


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--animals", type=int, default=8)
    parser.add_argument("--days", type=int, default=30)
    parser.add_argument("--repeat", type=int, default=3)
    args = parser.parse_args()
    runs = [run_once(args.animals, args.days, seed) for seed in range(1, args.repeat + 1)]
    times = [seconds for seconds, _ in runs]
    last_seconds, f = runs[-1]
    print(f"history {args.animals} animals x {args.days} days: "
          f"median {statistics.median(times):.2f} s over {len(times)} runs "
          f"(min {min(times):.2f}, max {max(times):.2f})")
    print(f"  last run: {f['sessions']} sessions, {f['trials']} completed trials, {f['lines']} lines, "
          f"{f['bytes'] / 1e6:.1f} MB -> {f['lines'] / last_seconds:,.0f} lines/s; "
          f"truth.json {f['truth_bytes'] / 1e3:.0f} kB")


if __name__ == "__main__":
    main()
