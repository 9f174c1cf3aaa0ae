"""`python -m benchmarks [--quick]`: run every benchmark, print one table of figures with units.

Rule: each benchmark runs in a child process of its own, one after another
(a crash, a hang or a leak of one cannot touch another's figures, and memory
is measured from a fresh interpreter). A benchmark module that defines
`figures(quick: bool) -> list[(label, value, unit, detail)]` is called through
it; one that does not is run as a script and its printed lines are shown as
they are. A benchmark that is missing, fails or times out gets the line
`LABEL: not available: WHY`, never a crash of the whole run. A figure line
reads `label: value unit` (values without thousands separators, so lines
parse); its detail (goal, method, side-by-side figures) follows indented.
The machine (CPU, cores, load, Python, SQLite) is printed first, since
figures mean little without it.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import sqlite3
import subprocess
import sys
import time
from pathlib import Path
from typing import NamedTuple

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
MARK = "@@figures@@ "


class Plan(NamedTuple):
    """One benchmark: its module, the label shown when it is not available, script options for --quick.

    `quick_args` apply to a module run as a script, each only if the script mentions the option.
    """

    module: str
    label: str
    quick_args: tuple[str, ...] = ()


PLAN = (
    Plan("bench_ingest", "ingest (decode+store)"),
    Plan("bench_decode", "decode"),
    Plan("bench_latency", "event-to-screen latency p50/p99, 16 rigs", ("--seconds=8",)),
    Plan("bench_gui", "GUI main thread per refresh"),
    Plan("bench_core", "incremental vs from scratch at 30000 trials"),
    Plan("bench_refit", "refit at session end (30000 trials)", ("--maxiter=5",)),
    Plan("bench_memory", "memory growth, 16 rigs x 8 h accelerated"),
    Plan("bench_history", "simulator history"),
    Plan("bench_cohort", "cohort commands beside the yardstick"),
    Plan("bench_effects", "effects on a simulated cohort"),
)


def machine() -> list[str]:
    """What the figures were measured on."""
    cpu = platform.processor() or "unknown CPU"
    try:
        with open("/proc/cpuinfo") as fh:
            cpu = next(line.split(":", 1)[1].strip() for line in fh if line.startswith("model name"))
    except (OSError, StopIteration):
        pass
    usable = len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else os.cpu_count()
    load = " / ".join(f"{x:.2f}" for x in os.getloadavg()) if hasattr(os, "getloadavg") else "n/a"
    return [
        f"machine: {cpu}, {os.cpu_count()} cores ({usable} usable), {platform.system()} {platform.release()}",
        f"software: Python {platform.python_version()}, SQLite {sqlite3.sqlite_version}",
        f"load average at start (1/5/15 min): {load}",
    ]


def value_text(value: float, unit: str) -> str:
    if unit.endswith("/s") or (unit == "x" and value >= 100):
        return f"{value:.0f}"
    if unit in ("ms", "MB", "x"):
        return f"{value:.1f}"
    return f"{value:.2f}"


def run_child(plan: Plan, quick: bool, timeout: float) -> list[str]:
    """The table lines of one benchmark (or its 'not available' line)."""
    path = HERE / f"{plan.module}.py"
    if not path.is_file():
        return [f"{plan.label}: not available: benchmarks/{path.name} does not exist yet"]
    source = path.read_text(encoding="utf-8")
    env = {**os.environ, "QT_QPA_PLATFORM": os.environ.get("QT_QPA_PLATFORM", "offscreen"),
           "PYTHONPATH": os.pathsep.join(filter(None, [str(ROOT), os.environ.get("PYTHONPATH")]))}
    as_function = "\ndef figures(" in source
    if as_function:
        command = [sys.executable, "-m", "benchmarks", "--child", plan.module] + (["--quick"] if quick else [])
    else:
        args = [a for a in plan.quick_args if a.split("=")[0] in source] if quick else []
        command = [sys.executable, str(path), *args]
    try:
        done = subprocess.run(command, cwd=ROOT, env=env, capture_output=True, text=True, timeout=timeout)
    except subprocess.TimeoutExpired:
        return [f"{plan.label}: not available: did not finish within {timeout:.0f} s"]
    if done.returncode != 0:
        last = (done.stderr.strip().splitlines() or ["no error text"])[-1]
        return [f"{plan.label}: not available: exit {done.returncode}: {last}"]
    if not as_function:
        lines = [line.rstrip() for line in done.stdout.splitlines() if line.strip()]
        return lines + [f"    (printed by benchmarks/{path.name}{' ' + ' '.join(command[2:]) if command[2:] else ''})"]
    payload = [line[len(MARK):] for line in done.stdout.splitlines() if line.startswith(MARK)]
    if not payload:
        return [f"{plan.label}: not available: the benchmark printed no figures"]
    lines = []
    for label, value, unit, detail in json.loads(payload[-1]):
        lines.append(f"{label}: {value_text(value, unit)} {unit}")
        if detail:
            lines.append(f"    {detail}")
    return lines


def child(module: str, quick: bool) -> int:
    """Inside the child process: print one module's figures as JSON after the marker."""
    import importlib

    figures = importlib.import_module(f"benchmarks.{module}").figures(quick)
    print(MARK + json.dumps([[label, float(value), unit, detail] for label, value, unit, detail in figures]))
    return 0


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="python -m benchmarks", description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="smaller runs: about a minute in all")
    parser.add_argument("--only", nargs="+", metavar="MODULE", help="run only these (e.g. bench_ingest)")
    parser.add_argument("--child", help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.child:
        return child(args.child, args.quick)
    plans = [p for p in PLAN if not args.only or p.module in args.only]
    command = "python -m benchmarks" + (" --quick" if args.quick else "")
    print(f"rigside benchmarks — {command} — {time.strftime('%Y-%m-%d %H:%M UTC', time.gmtime())}")
    for line in machine():
        print(line)
    print("-" * 72)
    started = time.monotonic()
    for plan in plans:
        for line in run_child(plan, args.quick, timeout=240 if args.quick else 900):
            print(line, flush=True)
    print("-" * 72)
    load = " / ".join(f"{x:.2f}" for x in os.getloadavg()) if hasattr(os, "getloadavg") else "n/a"
    print(f"total {time.monotonic() - started:.0f} s; load average at the end: {load}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
