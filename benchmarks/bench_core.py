"""Live analysis cost: incremental updates against recomputing from scratch.

Prints the per-event cost of `LiveSession.feed` (trial segmentation plus every
live statistic), the cost of one snapshot, and the cost of one refresh done the
plain batch way (segment all events again, then numpy over all trials) at
30,000 trials, with their ratio. A refresh of the live view (about 20 per
second) costs one snapshot plus the events that arrived since the last one.
Run: python benchmarks/bench_core.py [TRIALS]
"""

from __future__ import annotations

import math
import sys
import time
from typing import Any, NamedTuple

import numpy as np

from drivers.wire import Event, decode_all, encode_event
from monitor.core.session.binomial import wilson
from monitor.core.protocol import parse_protocol
from monitor.core.session.animal_report import SessionData, animal_report
from monitor.core.session.live_stats import LiveSession
from monitor.core.session.trials import build_trials

PROTOCOL = """
[protocol]
name = "bench"
version = 1
task = "two_press"
target_ms = 700
tolerance = 0.2
reward_ul = 5
"""
WINDOW = 100
EVENTS_PER_REFRESH = 5  # a busy box: ~100 events/s at 20 refreshes/s


def session_bytes(trials: int, seed: int = 1) -> bytes:
    """A long session of our own simulated animal: press pairs, licks and rewards."""
    rng = np.random.default_rng(seed)
    lines, t = [], 1_000_000
    wrap = 1 << 32  # the rig's 32-bit microsecond counter wraps every ~71.6 min; the decoder unwraps it

    def line(time_us: int, name: str) -> bytes:
        return encode_event(time_us % wrap, name)

    for _ in range(trials):
        interval = max(50.0, rng.lognormal(math.log(700), 0.25)) * 1000
        second = t + int(interval)
        lines += [line(t, "lever_down"), line(t + 90_000, "lever_up"), line(second, "lever_down"),
                  line(second + 90_000, "lever_up")]
        if 560_000 <= interval <= 840_000:
            lines += [line(second + 150_000, "reward"), line(second + 400_000, "lick")]
        t += int(interval) + 2_500_000
    return b"".join(lines)


def batch_refresh(protocol, events: list[Event]) -> dict:
    """Everything the live view shows, recomputed from all events with a plain batch approach."""
    trials, _ = build_trials(protocol, events)
    done = [t for t in trials if t.completed]
    intervals = np.array([t.interval_ms for t in done])
    targets = np.array([t.target_ms for t in done])
    rewarded = np.array([t.rewarded for t in done])
    last = rewarded[-WINDOW:]
    top = protocol.final_stage.window_high_ms
    return {
        "hits": int(rewarded.sum()),
        "rolling": wilson(int(last.sum()), len(last)),
        "median": float(np.median(intervals)),
        "rolling_median": float(np.median(intervals[-WINDOW:])),
        "cv": float(np.std(intervals, ddof=1) / np.mean(intervals)),
        "fwf": float(np.mean((intervals >= 560) & (intervals <= 840))),
        "mae": float(np.median(np.abs(np.log(intervals / targets)))),
        "linear": np.histogram(intervals, bins=60, range=(0, 2 * top))[0],
        "log": np.histogram(intervals, bins=np.geomspace(max(top / 100, 1), 10 * top, 61))[0],
        "water": 5.0 * sum(e.name == "reward" for e in events),
        "licks": sum(e.name == "lick" for e in events),
    }


def best_of(fn, repeats: int) -> float:
    times = []
    for _ in range(repeats):
        start = time.perf_counter()
        fn()
        times.append(time.perf_counter() - start)
    return min(times)


class CoreTimes(NamedTuple):
    """One measurement: the finished live session, its events, the timings and the agreement check."""

    protocol: Any
    live: LiveSession
    snap: Any
    events: list[Event]
    feed_s: float
    per_event_us: float
    snapshot_s: float
    batch_s: float
    refresh_s: float
    agree: bool


def measure(trials: int = 30_000, repeats: int = 3) -> CoreTimes:
    """Time the incremental path and the from-scratch refresh over one long session."""
    protocol = parse_protocol(PROTOCOL, "bench.toml")
    events = [r for r in decode_all(session_bytes(trials)) if isinstance(r, Event)]

    def incremental() -> LiveSession:
        live = LiveSession(protocol, window=WINDOW)
        for event in events:
            live.feed(event)
        return live

    live = incremental()
    feed_s = best_of(incremental, repeats)
    per_event_us = feed_s / len(events) * 1e6
    snapshot_s = best_of(lambda: [live.snapshot() for _ in range(200)], repeats) / 200
    batch_s = best_of(lambda: batch_refresh(protocol, events), repeats)
    refresh_s = snapshot_s + EVENTS_PER_REFRESH * per_event_us / 1e6
    live.finish()  # the batch path closes the last attempt too
    snap, ref = live.snapshot(), batch_refresh(protocol, events)
    agree = snap.hits == ref["hits"] and snap.median_interval_ms == ref["median"] \
        and np.array_equal(snap.linear.today, ref["linear"]) and np.array_equal(snap.log.today, ref["log"])
    return CoreTimes(protocol, live, snap, events, feed_s, per_event_us, snapshot_s, batch_s, refresh_s, agree)


def figures(quick: bool = False) -> list[tuple[str, float, str, str]]:
    """Table lines for `python -m benchmarks`: (label, value, unit, detail)."""
    m = measure(repeats=1 if quick else 3)
    ratio = m.batch_s / m.refresh_s
    return [(f"incremental vs from scratch at {m.snap.trials} trials", ratio, "x",
             f"goal >= 100x ({'met' if ratio >= 100 else 'NOT met'}); per refresh {m.refresh_s * 1e6:.0f} us "
             f"({EVENTS_PER_REFRESH} events at {m.per_event_us:.1f} us + snapshot {m.snapshot_s * 1e6:.0f} us) vs "
             f"{m.batch_s * 1e3:.0f} ms recomputed; {len(m.events):,} events; results agree: {m.agree}")]


def main() -> None:
    trials = int(sys.argv[1]) if len(sys.argv) > 1 else 30_000
    protocol, live, snap, events, feed_s, per_event_us, snapshot_s, batch_s, refresh_s, agree = measure(trials)

    print(f"session: {snap.trials} trials, {len(events)} events (incremental and batch agree: {agree})")
    print(f"incremental update: {per_event_us:.2f} us per event ({feed_s:.2f} s for all events)")
    print(f"snapshot: {snapshot_s * 1e6:.1f} us")
    print(f"incremental refresh ({EVENTS_PER_REFRESH} new events + snapshot): {refresh_s * 1e6:.1f} us")
    print(f"batch refresh from scratch at {snap.trials} trials: {batch_s * 1e3:.1f} ms")
    print(f"ratio batch / incremental per refresh: {batch_s / refresh_s:.0f}x (goal >= 100x)")

    per_session = max(1, snap.trials // 30)
    chunks = [live.trials[i : i + per_session] for i in range(0, len(live.trials), per_session)]
    animal_report("warm-up", protocol, [SessionData(trials=chunks[0])])  # scipy's first import is not counted
    start = time.perf_counter()
    report = animal_report("bench", protocol, [SessionData(trials=chunk) for chunk in chunks])
    report_s = time.perf_counter() - start
    print(f"report of {len(chunks)} sessions x {per_session} trials (every plateau rule, learning trial): "
          f"{report_s:.2f} s; plateau reached: {report['plateau']['reached']}")


if __name__ == "__main__":
    main()
