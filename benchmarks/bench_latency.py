"""Event-to-screen latency and GUI main-thread time per refresh, 16 rigs at full line rate, offscreen.

Rule: 16 synthetic boards, each a thread that encodes two-press trials with
the project's encoder and decodes them with the real `WireDecoder` in
10 ms reads (as the serial reader does), hand their batches to the real
Fanout → StoreWriter (a temporary database) and Engine, read by the real
Controller's ~20 Hz timer into the real MainWindow (overview shown,
1366×768). Each batch is stamped with `time.monotonic()` when the reader hands
it over; a tile's latency is the time from that stamp of the newest batch in
the state it shows to the end of the tile's paint. Main-thread time per
refresh = the timer handler plus the tile paints that follow it (wall time,
and the main thread's own CPU time: the difference is waiting for the GIL and
for the machine's cores). Prints p50 /
p95 / p99 / max. Goals: refresh with paint <= 30 ms, latency p99 <= 150 ms.

Run: QT_QPA_PLATFORM=offscreen python benchmarks/bench_latency.py [--seconds 20] [--rigs 16] [--lines 700]
"""

from __future__ import annotations

import argparse
import os
import tempfile
import threading
import time
from pathlib import Path

import numpy as np

os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")

from PySide6.QtCore import QTimer  # noqa: E402
from PySide6.QtWidgets import QApplication  # noqa: E402

from drivers.status import READING, Batch, SourceStatus  # noqa: E402
from drivers.wire import WireDecoder, encode_event, encode_header  # noqa: E402
from monitor.app.rigs import RigSpec  # noqa: E402
from monitor.app.window.controller import Controller  # noqa: E402
from monitor.store.writer import StoreWriter  # noqa: E402
from monitor.ui import tile as tile_module  # noqa: E402
from monitor.ui.main_window import MainWindow  # noqa: E402
from monitor.ui.models import CheckIn  # noqa: E402

PROTOCOL = """
[protocol]
name = "two-press 650 ms"
version = 1
task = "two_press"
target_ms = 650
tolerance = 0.2
"""


class SyntheticBoard:
    """A board sending `lines` lines a second of two-press trials (time runs fast to keep that rate)."""

    def __init__(self, fanout, lines: int, seed: int) -> None:
        self.fanout, self.lines = fanout, lines
        self.rng = np.random.default_rng(seed)
        self.decoder = WireDecoder()
        self._stop = threading.Event()
        self.thread = threading.Thread(target=self._run, daemon=True)
        self.sent = 0

    def start(self) -> None:
        self.thread.start()

    def stop(self) -> None:
        self._stop.set()
        self.thread.join(2)

    def status(self) -> SourceStatus:
        return SourceStatus(READING, self.sent, 0, 0, 0.0, None, 0, None, None, None)

    def _trial(self, t_us: int) -> tuple[list[bytes], int]:
        interval = int(650_000 * np.exp(self.rng.normal(0, 0.2)))
        hit = abs(interval - 650_000) <= 130_000
        lines = [encode_event(t_us, "trial_start"), encode_event(t_us + 1000, "lever_down"),
                 encode_event(t_us + 40_000, "lever_up"), encode_event(t_us + interval, "lever_down"),
                 encode_event(t_us + interval + 40_000, "lever_up"),
                 encode_event(t_us + interval + 41_000, "outcome", "hit" if hit else "miss")]
        if hit:
            lines.append(encode_event(t_us + interval + 42_000, "reward", "25"))
        return lines, t_us + interval + 200_000

    def _run(self) -> None:
        pending = [encode_header(clock="us", wrap=32)]
        t_us = 1_000_000
        next_read = time.monotonic()
        while not self._stop.is_set():
            while len(pending) < self.lines // 100 + 1:
                lines, t_us = self._trial(t_us)
                pending += lines
            take, pending = pending[: max(1, self.lines // 100)], pending[max(1, self.lines // 100):]
            records = self.decoder.feed(b"".join(take))
            self.sent += len(take)
            self.fanout(Batch(records, time.time()))
            next_read += 0.01
            self._stop.wait(max(0.0, next_read - time.monotonic()))


def stats(label: str, values_s: list[float]) -> str:
    if not values_s:
        return f"{label:<44} n=     0"
    ms = np.array(values_s) * 1000
    return (f"{label:<44} n={len(ms):6d}  p50 {np.percentile(ms, 50):6.1f}  p95 {np.percentile(ms, 95):6.1f}  "
            f"p99 {np.percentile(ms, 99):6.1f}  max {ms.max():6.1f} ms")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seconds", type=float, default=20.0)
    parser.add_argument("--rigs", type=int, default=16)
    parser.add_argument("--lines", type=int, default=700, help="lines per second per rig (115200 baud ≈ 700)")
    args = parser.parse_args()
    app = QApplication.instance() or QApplication([])
    folder = Path(tempfile.mkdtemp(prefix="rigside-bench-"))
    protocol = folder / "p.toml"
    protocol.write_text(PROTOCOL)
    writer = StoreWriter(folder / "bench.sqlite3")
    writer.start()
    controller = Controller(writer, fit_consolidation=False)
    window = MainWindow(controller.board, controller.book, controller.alert_book)
    controller.attach(window)
    boards: list[SyntheticBoard] = []
    for k in range(args.rigs):
        def factory(fanout, k=k):
            boards.append(SyntheticBoard(fanout, args.lines, k))
            return boards[-1]
        controller.add_rig(RigSpec(f"box{k + 1}", "serial", f"synthetic:{k}", protocol), start=False,
                           source_factory=factory)
    window.resize(1366, 768)
    window.show()
    controller.start()
    for k in range(args.rigs):
        controller.check_in(CheckIn(f"animal{k + 1}", f"box{k + 1}", "bench", 300.0, "default"))
    deadline = time.monotonic() + 10
    while any(r.session_id is None for r in controller.rigs.values()) and time.monotonic() < deadline:
        app.processEvents()
        time.sleep(0.01)

    pending: dict[str, float] = {}
    latencies: list[float] = []
    ticks: list[float] = []
    cpu_ticks: list[float] = []
    bucket = [0.0, 0.0]
    original_refresh, original_paint = controller.refresh, tile_module.RigTile.paintEvent

    def refresh() -> None:
        if bucket[0]:
            ticks.append(bucket[0])
            cpu_ticks.append(bucket[1])
        t0, c0 = time.perf_counter(), time.thread_time()
        shown = len(controller.painted)
        original_refresh()
        for rig, stamp in controller.painted[shown:]:
            pending[rig] = stamp
        bucket[0], bucket[1] = time.perf_counter() - t0, time.thread_time() - c0

    def paint(self, event) -> None:
        t0, c0 = time.perf_counter(), time.thread_time()
        original_paint(self, event)
        bucket[0] += time.perf_counter() - t0
        bucket[1] += time.thread_time() - c0
        stamp = pending.pop(self.state.rig, None)
        if stamp:
            latencies.append(time.monotonic() - stamp)

    tile_module.RigTile.paintEvent = paint
    controller.timer.timeout.disconnect()
    controller.timer.timeout.connect(refresh)
    for board in boards:
        board.start()
    QTimer.singleShot(int(args.seconds * 1000), app.quit)
    app.exec()
    for board in boards:
        board.stop()
    sent = sum(b.sent for b in boards)
    snapshot_trials = sum(r.snapshot.live.trials for r in controller.rigs.values() if r.snapshot and r.snapshot.live)
    stored = controller.close()
    print(f"{args.rigs} rigs x {args.lines} lines/s for {args.seconds:g} s: {sent} lines sent, "
          f"{snapshot_trials} trials on screen, engine batches dropped "
          f"{sum(r.fanout.engine_dropped for r in controller.rigs.values())}, store ok={stored}, "
          f"{writer.status().committed_events} events stored")
    print(stats("GUI main thread per refresh, paint incl.", ticks))
    print(stats("  of which CPU time of the main thread", cpu_ticks))
    print(stats("event-to-screen latency (reader -> painted)", latencies))


if __name__ == "__main__":
    main()
