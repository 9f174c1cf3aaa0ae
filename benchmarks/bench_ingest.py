"""Ingest figures for the live sources and the store's single writer (prints, never asserts).

Prints:
  ingest (decode+store): N events/s      wire decode + StoreWriter, commits every <= 100 ms
  the same with synchronous=NORMAL, and the commit time (median, p95) under each level
  file source into the store: N events/s a FileTail + fan-out + writer catching up on a big file
  idle CPU of a serial source (pty) and of a file source over --idle seconds
  reconnect after re-plug (pty behind a symlink): median and max over --replugs

Pinned to one core where the OS allows (os.sched_setaffinity). Run:
  python benchmarks/bench_ingest.py [--events N] [--idle S] [--replugs K] [--dir FOLDER]
"""

from __future__ import annotations

import argparse
import os
import statistics
import sys
import tempfile
import time
from pathlib import Path

from drivers.status import CONNECTED, Batch
from drivers.tail import FileTail
from drivers.wire import WireDecoder, encode_event, encode_header
from monitor.app.live.pipeline import Fanout
from monitor.store import db
from monitor.store.writer import StoreWriter

NAMES = ("lever_down", "lever_up", "lick", "trial_start", "reward")


def wire_bytes(n: int) -> bytes:
    parts = [encode_header(fw="bench")]
    for i in range(n):
        name = NAMES[i % len(NAMES)]
        parts.append(encode_event(i * 37, name, 30) if name == "reward" else encode_event(i * 37, name))
    return b"".join(parts)


def wait_until(condition, timeout: float = 600.0) -> None:
    deadline = time.monotonic() + timeout
    while not condition():
        if time.monotonic() > deadline:
            raise TimeoutError("benchmark did not finish")
        time.sleep(0.002)


def new_writer(folder: Path, name: str, synchronous: str) -> tuple[StoreWriter, int, int]:
    writer = StoreWriter(folder / name, synchronous=synchronous)
    writer.start()
    source = writer.call(lambda c: db.register_source(c, "file", f"/bench/{name}", "bench"))
    session = writer.call(lambda c: db.start_session(c, source, "bench", "bench", "p", 1, ""))
    return writer, source, session


def commit_times(folder: Path, synchronous: str, rounds: int = 50) -> list[float]:
    """Seconds per commit of 100 event rows (what one rig sends in well under 100 ms)."""
    conn = db.open_store(folder / f"commit-{synchronous}.sqlite3", synchronous=synchronous)
    rows = [(1, 1, i, i * 37, i * 37, 1, None, None) for i in range(100)]
    times = []
    for _ in range(rounds):
        start = time.perf_counter()
        conn.execute("BEGIN IMMEDIATE")
        conn.executemany("INSERT INTO events VALUES (?, ?, ?, ?, ?, ?, ?, ?)", rows)
        conn.execute("COMMIT")
        times.append(time.perf_counter() - start)
    conn.close()
    return sorted(times)


def bench_decode_store(folder: Path, n: int, synchronous: str) -> tuple[float, list[float]]:
    data = wire_bytes(n)
    writer, source, session = new_writer(folder, f"ingest-{synchronous}.sqlite3", synchronous)
    decoder = WireDecoder()
    start = time.perf_counter()
    for at in range(0, len(data), 64 * 1024):
        records = decoder.feed(data[at:at + 64 * 1024])
        writer.submit(Batch(records, time.time()), source_id=source, session_id=session, live=False)
    wait_until(lambda: writer.status().committed_events >= n)
    rate = n / (time.perf_counter() - start)
    writer.stop()
    return rate, commit_times(folder, synchronous)


def decode_only(data: bytes, chunk: int = 64 * 1024) -> float:
    """Seconds to decode `data` in `chunk`-sized reads, records discarded (the ingest path's first half)."""
    decoder = WireDecoder()
    start = time.perf_counter()
    for at in range(0, len(data), chunk):
        decoder.feed(data[at:at + chunk])
    return time.perf_counter() - start


def figures(quick: bool = False) -> list[tuple[str, float, str, str]]:
    """Table lines for `python -m benchmarks`: (label, value, unit, detail).

    Pinned to one core; decode alone is measured on the same bytes, between the
    ingest runs, so the store's share of the cost is read from one run.
    """
    if hasattr(os, "sched_setaffinity"):
        os.sched_setaffinity(0, {sorted(os.sched_getaffinity(0))[0]})
    n, runs = (150_000, 1) if quick else (300_000, 3)
    data = wire_bytes(n)
    ingest, decode = [], []
    with tempfile.TemporaryDirectory() as tmp:
        for i in range(runs):
            decode.append(n / decode_only(data))
            folder = Path(tmp) / str(i)
            folder.mkdir()
            ingest.append(bench_decode_store(folder, n, db.SYNCHRONOUS)[0])
    rate, alone = statistics.median(ingest), statistics.median(decode)
    spread = f"runs {min(ingest):,.0f}-{max(ingest):,.0f}; " if runs > 1 else ""
    goal = "met" if rate >= 150_000 else "NOT met"
    return [
        ("ingest (decode+store)", rate, "events/s",
         f"goal >= 150,000 ({goal}); {n:,} events, synchronous={db.SYNCHRONOUS}, commits <= 100 ms, one core; "
         f"{spread}median of {runs}; {rate / (16 * 115200 / 10 / 16):.0f}x the wire limit of 16 ports"),
        ("decode alone (same bytes, same core)", alone, "lines/s",
         f"ingest runs at {rate / alone:.0%} of decode alone: the store's share of the time is "
         f"{1 - rate / alone:.0%}"),
    ]


def bench_file_source(folder: Path, n: int) -> float:
    log = folder / "source.rsw"
    log.write_bytes(wire_bytes(n))
    writer, source, session = new_writer(folder, "file-source.sqlite3", db.SYNCHRONOUS)
    tail = FileTail(log, Fanout(writer, source_id=source, session_id=session, live=False),
                    should_pause=lambda: writer.backlogged)
    start = time.perf_counter()
    tail.start()
    wait_until(lambda: writer.status().committed_events >= n)
    rate = n / (time.perf_counter() - start)
    tail.stop()
    writer.stop()
    return rate


def cpu_seconds() -> float:
    """User + system CPU seconds of this process (what getrusage reports, on every platform)."""
    return time.process_time()


def idle_cpu(make_source, seconds: float) -> float:
    source = make_source()
    source.start()
    wait_until(lambda: source.status().state == CONNECTED, 10)
    before = cpu_seconds()
    time.sleep(seconds)  # the measurement itself: the process does nothing else meanwhile
    used = cpu_seconds() - before
    source.stop()
    return 100.0 * used / seconds


def bench_reconnect(folder: Path, replugs: int) -> list[float]:
    import pty
    import tty

    from drivers.serial import SerialSource

    def board() -> tuple[int, int, str]:
        master, slave = pty.openpty()
        tty.setraw(master)
        return master, slave, os.ttyname(slave)

    link = folder / "rig-by-id"
    current = board()
    os.symlink(current[2], link)
    source = SerialSource(str(link), lambda batch: None, wait_for_header=False)
    source.start()
    wait_until(lambda: source.status().state == CONNECTED, 10)
    times = []
    for _ in range(replugs):
        nxt = board()
        os.close(current[0])
        os.close(current[1])
        wait_until(lambda: source.status().state != CONNECTED, 10)
        tmp = folder / "tmp-link"
        os.symlink(nxt[2], tmp)
        os.replace(tmp, link)
        start = time.perf_counter()
        wait_until(lambda: source.status().state == CONNECTED, 10)
        times.append(time.perf_counter() - start)
        current = nxt
    source.stop()
    os.close(current[0])
    os.close(current[1])
    return times


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--events", type=int, default=300_000)
    parser.add_argument("--idle", type=float, default=10.0, help="seconds of idle measurement per source")
    parser.add_argument("--replugs", type=int, default=10)
    parser.add_argument("--dir", help="folder for the scratch databases (default: the system temp folder)")
    args = parser.parse_args()
    if hasattr(os, "sched_setaffinity"):
        os.sched_setaffinity(0, {sorted(os.sched_getaffinity(0))[0]})
        print("pinned to one core")
    with tempfile.TemporaryDirectory(dir=args.dir) as tmp:
        folder = Path(tmp)
        for level in ("FULL", "NORMAL"):
            rate, commits = bench_decode_store(folder, args.events, level)
            label = "ingest (decode+store)" if level == db.SYNCHRONOUS else f"ingest (decode+store, synchronous={level})"
            print(f"{label}: {rate:,.0f} events/s")
            print(f"  commit of a 100-event batch, synchronous={level}: median {statistics.median(commits) * 1000:.2f} ms, "
                  f"p95 {commits[int(0.95 * (len(commits) - 1))] * 1000:.2f} ms")
        print(f"file source into the store (sustained, catching up on {args.events:,} lines): "
              f"{bench_file_source(folder, args.events):,.0f} events/s")
        size = (folder / "file-source.sqlite3").stat().st_size
        print(f"  bytes on disk per 10^6 events (file-source store after checkpoint): {size / args.events:,.1f} MB")
        if os.name == "posix":
            import pty
            import tty

            from drivers.serial import SerialSource

            master, slave = pty.openpty()
            tty.setraw(master)
            name = os.ttyname(slave)
            serial_cpu = idle_cpu(lambda: SerialSource(name, lambda b: None, wait_for_header=False), args.idle)
            print(f"idle CPU, serial source (pty, nothing sent) over {args.idle:g} s: {serial_cpu:.2f} % of one core")
            os.close(master)
            os.close(slave)
            log = folder / "idle.rsw"
            log.write_bytes(b"")
            file_cpu = idle_cpu(lambda: FileTail(log, lambda b: None), args.idle)
            print(f"idle CPU, file source (no growth, 200 ms polls) over {args.idle:g} s: {file_cpu:.2f} % of one core")
            times = bench_reconnect(folder, args.replugs)
            print(f"reconnect after re-plug (pty behind a symlink, retry every 200 ms): median "
                  f"{statistics.median(times) * 1000:.0f} ms, max {max(times) * 1000:.0f} ms over {len(times)}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
