"""Memory growth over an accelerated long session of 16 rigs (prints figures, never asserts).

Rule: 16 simulated animals (mock_rig's cohort, its own learners and boxes) each
run one session of `hours` hours of device time with no trial or water limit.
Their lines take the path a live rig's lines take, as fast as the machine goes:
one trial's lines at a time (rigs interleaved in device time) through a
`WireDecoder` per rig, then a `Fanout` to the store's single `StoreWriter`
(durable commits every <= 100 ms) and to the engine queue, drained into one
`LiveSession` per rig (snapshot every `snapshot_every_s` of device time, the
latest kept, as the screen would). The producer waits while more than
`max_backlog_rows` events are submitted but not yet committed (queued or in
the writer's memory; 2,000 is what 16 rigs at the wire limit send in 0.2 s),
so the figure is the program's own growth, not a backlog that real-time rigs
could never build. Memory is the resident
set size read from /proc/self/status (VmRSS, VmHWM): growth = RSS at the end
minus RSS once everything is set up, before the first line; its anonymous part
(RssAnon: heap) and file-backed part (RssFile: library pages touched for the
first time) are shown apart. Linux only.
Run: python benchmarks/bench_memory.py [--hours 8] [--rigs 16]
"""

from __future__ import annotations

import argparse
import heapq
import queue
import sys
import tempfile
import time
from dataclasses import dataclass, replace
from datetime import UTC, datetime
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from drivers.status import Batch  # noqa: E402
from drivers.wire import Event, WireDecoder  # noqa: E402
from mock_rig.history import cohort  # noqa: E402
from mock_rig.protocol_file import protocol_toml  # noqa: E402
from monitor.app.live.pipeline import Fanout  # noqa: E402
from monitor.core.protocol import parse_protocol  # noqa: E402
from monitor.core.session.live_stats import LiveSession  # noqa: E402
from monitor.store import db  # noqa: E402
from monitor.store.writer import StoreWriter  # noqa: E402

GOAL_MB = 50.0


def proc_status_kb(field: str) -> int:
    """A `kB` field of /proc/self/status (VmRSS, VmHWM)."""
    with open("/proc/self/status") as fh:
        for line in fh:
            if line.startswith(field + ":"):
                return int(line.split()[1])
    raise KeyError(field)


@dataclass
class MemoryRun:
    hours: float
    rigs: int
    events: int
    trials: int
    seconds: float
    rss_start_mb: float
    rss_end_mb: float
    peak_mb: float
    anon_mb: float  # growth of RssAnon
    file_mb: float  # growth of RssFile
    hourly_mb: list[float]  # RSS growth at the end of each simulated hour
    engine_dropped: int

    @property
    def growth_mb(self) -> float:
        return self.rss_end_mb - self.rss_start_mb


class Rig:
    """One simulated box and the app's per-rig pieces: decoder, fan-out, live session."""

    def __init__(self, animal, hours: float, writer: StoreWriter, engine: queue.Queue, wall: datetime) -> None:
        animal.protocol = replace(animal.protocol, max_minutes=hours * 60, max_trials=10**9, max_water_ul=1e12)
        protocol = parse_protocol(protocol_toml(animal.protocol), f"{animal.name}.toml")
        self.session, self.board, header = animal.open_session(wall)
        self.decoder = WireDecoder()
        name = animal.name
        source = writer.call(lambda c: db.register_source(c, "serial", f"/dev/sim/{name}", name))
        self.session_id = writer.call(lambda c: db.start_session(c, source, name, name, protocol.name,
                                                                 protocol.version, None))
        self.fanout = Fanout(writer, source_id=source, session_id=self.session_id, live=True, engine=engine)
        self.live = LiveSession(protocol)
        self.pending = header
        self.latest = None
        self.next_snapshot = 0
        self.sent = 0  # events handed to the fan-out
        self.checked = 0  # `sent` when the store's backlog was last checked

    def step(self) -> bool:
        """Send the next trial's lines; False once the session has ended."""
        chunk = self.session.next_chunk()
        if chunk is None:
            return False
        encode = self.board.encode
        data = self.pending + b"".join(line for t, name, args in chunk if (line := encode(t, name, args)))
        self.pending = b""
        records = self.decoder.feed(data)
        if records:
            self.sent += sum(1 for r in records if type(r) is Event)
            self.fanout(Batch(records, time.time()))
        return True


def run(hours: float = 8.0, rigs: int = 16, seed: int = 11, snapshot_every_s: float = 10.0,
        max_backlog_rows: int = 2_000, folder: str | None = None) -> MemoryRun:
    """Run the accelerated session; return its figures."""
    with tempfile.TemporaryDirectory(dir=folder) as tmp:
        writer = StoreWriter(Path(tmp) / "memory.sqlite3")
        writer.start()
        engine: queue.Queue = queue.Queue(maxsize=10_000)
        wall = datetime(2026, 3, 2, 9, 0, tzinfo=UTC)
        boxes = {}
        for animal in cohort(rigs, seed):
            rig = Rig(animal, hours, writer, engine, wall)
            boxes[rig.session_id] = rig
        by_time = [(0, sid) for sid in boxes]
        heapq.heapify(by_time)
        rss_start, anon_start, file_start = (proc_status_kb(f) for f in ("VmRSS", "RssAnon", "RssFile"))
        hourly: list[float] = []
        next_hour_us = 3600 * 10**6
        events = 0
        started = time.perf_counter()
        while by_time:
            now_us, sid = heapq.heappop(by_time)
            while now_us >= next_hour_us:
                hourly.append((proc_status_kb("VmRSS") - rss_start) / 1024)
                next_hour_us += 3600 * 10**6
            rig = boxes[sid]
            if rig.step():
                heapq.heappush(by_time, (rig.session.now, sid))
            else:
                rig.live.finish()
            while True:  # the engine: per-event updates, a snapshot now and then
                try:
                    item = engine.get_nowait()
                except queue.Empty:
                    break
                target = boxes[item.session_id]
                for record in item.batch.records:
                    if type(record) is Event:
                        target.live.feed(record)
                        events += 1
                if target.session.now >= target.next_snapshot:
                    target.latest = target.live.snapshot()
                    target.next_snapshot = target.session.now + int(snapshot_every_s * 1e6)
            if rig.sent - rig.checked > max_backlog_rows // len(boxes):
                rig.checked = rig.sent
                sent = sum(r.sent for r in boxes.values())
                while sent - writer.status().committed_events > max_backlog_rows:
                    time.sleep(0.005)  # backpressure on the accelerated producer, not a measurement
        sent = sum(rig.sent for rig in boxes.values())
        deadline = time.monotonic() + 120
        while writer.status().committed_events < sent and time.monotonic() < deadline:
            time.sleep(0.01)  # let the last commit land before the final reading
        seconds = time.perf_counter() - started
        rss_end, anon_end, file_end = (proc_status_kb(f) for f in ("VmRSS", "RssAnon", "RssFile"))
        if len(hourly) < int(hours):
            hourly.append((rss_end - rss_start) / 1024)
        trials = sum(rig.live.snapshot().trials for rig in boxes.values())
        dropped = sum(rig.fanout.engine_dropped for rig in boxes.values())
        writer.stop()
    return MemoryRun(hours, rigs, events, trials, seconds, rss_start / 1024, rss_end / 1024,
                     max(rss_end, proc_status_kb("VmHWM")) / 1024, (anon_end - anon_start) / 1024,
                     (file_end - file_start) / 1024, hourly, dropped)


def figures(quick: bool = False) -> list[tuple[str, float, str, str]]:
    """Table lines for `python -m benchmarks`: (label, value, unit, detail)."""
    hours = 2.0 if quick else 8.0
    r = run(hours=hours)
    verdict = "met" if r.growth_mb <= GOAL_MB * hours / 8 else "NOT met"
    trend = ", ".join(f"{mb:.1f}" for mb in r.hourly_mb)
    return [(f"memory growth, {r.rigs} rigs x {r.hours:g} h accelerated", r.growth_mb, "MB",
             f"goal <= {GOAL_MB:g} MB over 8 h ({'pro rata ' if quick else ''}{verdict}); "
             f"{r.events:,} events, {r.trials:,} trials in {r.seconds:.0f} s; RSS {r.rss_start_mb:.0f} -> "
             f"{r.rss_end_mb:.0f} MB (peak {r.peak_mb:.0f}), of which heap {r.anon_mb:.1f} MB, library pages "
             f"{r.file_mb:.1f} MB; growth per simulated hour: {trend} MB; "
             f"engine batches dropped: {r.engine_dropped}")]


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--hours", type=float, default=8.0)
    parser.add_argument("--rigs", type=int, default=16)
    parser.add_argument("--seed", type=int, default=11)
    args = parser.parse_args()
    r = run(args.hours, args.rigs, args.seed)
    print(f"memory growth, {r.rigs} rigs x {r.hours:g} h accelerated: {r.growth_mb:.1f} MB (goal <= {GOAL_MB:g} MB)")
    print(f"  {r.events:,} events, {r.trials:,} trials through decoder -> fan-out -> store writer + live sessions "
          f"in {r.seconds:.1f} s ({r.events / r.seconds:,.0f} events/s)")
    print(f"  RSS {r.rss_start_mb:.1f} MB before the first line, {r.rss_end_mb:.1f} MB at the end, "
          f"peak {r.peak_mb:.1f} MB; growth of the heap (RssAnon) {r.anon_mb:.1f} MB, of library pages touched "
          f"(RssFile) {r.file_mb:.1f} MB")
    print("  growth at the end of each simulated hour: " + ", ".join(f"{mb:.1f}" for mb in r.hourly_mb) + " MB")
    print(f"  engine batches dropped (queue full): {r.engine_dropped}; "
          f"{(r.growth_mb * 1024) / max(1, r.trials):.2f} kB of growth per trial")


if __name__ == "__main__":
    main()
