"""Benchmark: cohort-scale commands beside a plain yardstick, on one simulated cohort.

Rule: every figure is printed beside the yardstick measured in the same run
and their ratio, so a slow or busy machine shows up in both. The cohort is
`python -m mock_rig history --animals 8 --days 30 --seed 11` (2 x 6 with
--quick). The yardstick is the simplest honest way to put the same files into
SQLite: read each file, split its lines, insert one row per line (WAL,
synchronous=FULL, one transaction per file); it runs again just before each
import figure, which is printed beside that run and their ratio. The commands are run as a user
runs them (`python -m monitor.app ...` in a child process), one after another:
import without fits (one command per protocol file, and one per animal),
import with fits (another database), events and trials CSV, the whole
cohort's report, and NWB when pynwb is installed; with --import-only, the
yardstick and the import without fits, a command per protocol, alone. Run:
    python benchmarks/bench_cohort.py [--quick] [--keep DIR] [--import-only]
"""

from __future__ import annotations

import argparse
import os
import shutil
import sqlite3
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent


def yardstick(files: list[Path], db: Path) -> tuple[float, int]:
    """Seconds and rows for the plain read-split-insert of `files` into a fresh SQLite file."""
    started = time.perf_counter()
    conn = sqlite3.connect(db, isolation_level=None)
    conn.execute("PRAGMA journal_mode=WAL")
    conn.execute("PRAGMA synchronous=FULL")
    conn.execute("CREATE TABLE lines (file TEXT, line INTEGER, t INTEGER, word TEXT, args TEXT)")
    rows = 0
    for path in files:
        batch = []
        for number, line in enumerate(path.read_text(encoding="ascii", errors="replace").splitlines(), 1):
            if not line or line.startswith("#"):
                continue
            parts = line.split(None, 2)
            if len(parts) < 2 or not parts[0].isdigit():
                continue
            batch.append((path.name, number, int(parts[0]), parts[1], parts[2] if len(parts) > 2 else None))
        conn.execute("BEGIN")
        conn.executemany("INSERT INTO lines VALUES (?, ?, ?, ?, ?)", batch)
        conn.execute("COMMIT")
        rows += len(batch)
    conn.close()
    return time.perf_counter() - started, rows


def rigside(*argv: str) -> float:
    """Seconds one `rigside` command takes in a child process; its failure ends the benchmark."""
    env = {**os.environ, "QT_QPA_PLATFORM": "offscreen",
           "PYTHONPATH": os.pathsep.join(filter(None, [str(ROOT), os.environ.get("PYTHONPATH")]))}
    started = time.perf_counter()
    done = subprocess.run([sys.executable, "-m", "monitor.app", *argv], cwd=ROOT, env=env,
                          capture_output=True, text=True)
    seconds = time.perf_counter() - started
    if done.returncode != 0:
        last = (done.stderr.strip().splitlines() or ["no error text"])[-1]
        raise RuntimeError(f"rigside {' '.join(argv[:2])} exited {done.returncode}: {last}")
    return seconds


def _children_cpu() -> float:
    """CPU seconds (user + system) of the finished child processes so far, theirs and their children's (nan
    where the OS does not say: Windows)."""
    try:
        import resource  # POSIX only
    except ImportError:
        return float("nan")
    used = resource.getrusage(resource.RUSAGE_CHILDREN)
    return used.ru_utime + used.ru_stime


def import_cohort(history: Path, db: Path, fit: bool, per_animal: bool = False) -> float:
    """Seconds to import every animal of `history` into `db`: one command per protocol (the animals
    that share a protocol file's text together), or one command per animal."""
    groups: dict[str, list[Path]] = {}
    for protocol in sorted(history.glob("*.protocol.toml")):
        key = protocol.name if per_animal else protocol.read_text(encoding="utf-8")
        groups.setdefault(key, []).append(protocol)
    total = 0.0
    for protocols in groups.values():
        files = sorted(str(p) for protocol in protocols
                       for p in history.glob(f"{protocol.name.removesuffix('.protocol.toml')}_s*.rsw"))
        total += rigside("import", *files, "--protocol", str(protocols[0]), "--db", str(db), "--quiet",
                         *(() if fit else ("--no-fit",)))
    return total


def export_csv(db: Path, folder: Path, yard_s: float, events: int, trials: int) -> list[tuple[str, float, str, str]]:
    """The events and trials CSVs of the cohort, each beside the yardstick."""
    out = []
    for what, rows, goal in (("events", events, " (goal >= 300000 rows/s)"), ("trials", trials, "")):
        seconds = rigside("export", what, "--db", str(db), "--csv", str(folder / f"{what}.csv"))
        out.append((f"cohort {what} CSV", seconds, "s",
                    f"{seconds / yard_s:.1f} x the yardstick; {rows:,} rows, {rows / seconds:,.0f} rows/s incl. "
                    f"start-up{goal}; load {os.getloadavg()[0]:.1f}"))
    return out


def export_nwb(db: Path, folder: Path, yard_s: float) -> list[tuple[str, float, str, str]]:
    """The cohort's NWB export beside the yardstick (goal <= 3 x), and its size beside the database's."""
    try:
        import pynwb  # noqa: F401  (optional extra)
    except ImportError:
        return [("cohort NWB export", float("nan"), "s", "not available: pynwb is not installed")]
    nwb_dir = folder / "nwb"
    nwb_s = rigside("export", "--db", str(db), "--nwb", str(nwb_dir))
    files = list(nwb_dir.rglob("*.nwb"))
    nwb_bytes = sum(p.stat().st_size for p in files)
    return [("cohort NWB export", nwb_s, "s",
             f"{nwb_s / yard_s:.1f} x the yardstick (goal <= 3); {len(files)} files, {nwb_s / len(files) * 1000:.0f} "
             f"ms a file; NWB / database size {nwb_bytes / db.stat().st_size:.2f} (goal <= 1.5); load "
             f"{os.getloadavg()[0]:.1f}")]


def figures(quick: bool = False, keep: Path | None = None,
            import_only: bool = False) -> list[tuple[str, float, str, str]]:
    """Table lines for `python -m benchmarks`: (label, value, unit, detail); with `import_only`, the yardstick
    and the import without fits, a command per protocol."""
    animals, days = (2, 6) if quick else (8, 30)
    folder = Path(tempfile.mkdtemp(prefix="bench_cohort_")) if keep is None else keep
    folder.mkdir(parents=True, exist_ok=True)
    try:
        history = folder / "history"
        subprocess.run([sys.executable, "-m", "mock_rig", "history", "--animals", str(animals), "--days", str(days),
                        "--seed", "11", "--out", str(history)], cwd=ROOT, check=True, capture_output=True)
        files = sorted(history.glob("*.rsw"))
        lines = sum(p.read_bytes().count(b"\n") for p in files)
        yard_s, yard_rows = yardstick(files, folder / "yardstick.sqlite")
        cohort = f"{animals} animals x {days} days, {len(files)} files, {lines:,} lines"
        out: list[tuple[str, float, str, str]] = [
            ("cohort yardstick: read, split, insert (WAL, FULL, a transaction per file)", yard_s, "s",
             f"{cohort}; {yard_rows:,} rows, {yard_rows / yard_s:,.0f} rows/s")]

        db = folder / "cohort.sqlite"
        for label, target, fit, per_animal, goal in (
                ("cohort import --no-fit, a command per protocol", db, False, False, " (goal <= 2)"),
                ("cohort import --no-fit, a command per animal", folder / "each.sqlite", False, True, ""),
                ("cohort import with fits, a command per protocol", folder / "fitted.sqlite", True, False,
                 " (goal <= 4)"))[:1 if import_only else None]:
            cpu = time.process_time()
            beside_s = yardstick(files, folder / f"yardstick-{target.stem}.sqlite")[0]  # just before: same load
            beside_cpu = time.process_time() - cpu
            cpu = _children_cpu()
            took_s = import_cohort(history, target, fit=fit, per_animal=per_animal)
            took_cpu = _children_cpu() - cpu
            out.append((label, took_s, "s", f"beside the yardstick {beside_s:.2f} s run just before it: "
                                            f"{took_s / beside_s:.1f} x{goal}; {lines / took_s:,.0f} lines/s; CPU "
                                            f"{took_cpu:.2f} s in all its processes, the yardstick's {beside_cpu:.2f} s"))
        if import_only:
            return out

        with sqlite3.connect(db) as conn:
            events = conn.execute("SELECT count(*) FROM events").fetchone()[0]
            trials = conn.execute("SELECT count(*) FROM trials").fetchone()[0]
        out.extend(export_csv(db, folder, yard_s, events, trials))
        report_s = rigside("report", "--db", str(db), "--json")
        out.append(("cohort report --json", report_s, "s", "goal <= 1 s, including the interpreter's start"))
        out.extend(export_nwb(db, folder, yard_s))
        return out
    finally:
        if keep is None:
            shutil.rmtree(folder, ignore_errors=True)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="2 animals x 6 days instead of 8 x 30")
    parser.add_argument("--keep", type=Path, help="work in this folder and keep it (default: a temporary one)")
    parser.add_argument("--import-only", action="store_true",
                        help="only the yardstick and the import without fits, a command per protocol")
    args = parser.parse_args()
    for label, value, unit, detail in figures(args.quick, args.keep, args.import_only):
        print(f"{label}: {value:.2f} {unit}")
        print(f"    {detail}")


if __name__ == "__main__":
    main()
