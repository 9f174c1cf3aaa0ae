"""monitor.app.live.engine: batches from the Fanout become snapshots equal to a batch recomputation."""

from __future__ import annotations

import time

import numpy as np
import pytest
from statsmodels.stats.proportion import proportion_confint

from drivers.status import READING, WAITING, Batch, SourceStatus
from drivers.wire import Event, WireDecoder
from monitor.app.live.engine import Engine, SessionPlan, link_of
from monitor.app.live.pipeline import Fanout
from monitor.core.protocol import parse_protocol
from monitor.core.session.trials import build_trials
from fixtures.protocols import two_press
from fixtures.sessions import params_bytes, session_bytes

PROTOCOL = two_press(plateau_sessions=3, min_trials=5)


class Writer:
    def __init__(self) -> None:
        self.rows = 0

    def submit(self, batch, *, source_id, session_id, live) -> None:
        self.rows += len(batch.records)


def status(state=READING, gap_since=None) -> SourceStatus:
    return SourceStatus(state, 0, 0, 0, 0.0, gap_since, 0, None, None, None)


def drain(engine: Engine) -> None:
    while not engine.queue.empty():
        engine.step(0)
    engine.step(0)


def feed(fanout: Fanout, data: bytes, pieces: int = 7) -> None:
    decoder = WireDecoder()
    for chunk in np.array_split(np.frombuffer(data, np.uint8), pieces):
        fanout(Batch(decoder.feed(chunk.tobytes()), time.time()))


@pytest.fixture
def intervals():
    rng = np.random.default_rng(5)
    return np.round(650 * np.exp(rng.normal(0, 0.25, 180)), 1)


def make(engine_kwargs=None):
    engine = Engine(publish_s=0.0, check_s=0.0, **(engine_kwargs or {}))
    writer = Writer()
    fanout = Fanout(writer, source_id=1, session_id=5, live=True, engine=engine.queue)
    engine.add_rig("box 1", 1, status)
    engine.open_session(SessionPlan("box 1", 5, "wren", PROTOCOL, started=100.0))
    return engine, writer, fanout


def test_snapshot_equals_a_batch_recomputation(intervals):
    engine, writer, fanout = make()
    data = session_bytes(intervals)
    feed(fanout, data)
    drain(engine)
    snap = engine.take_snapshots()["box 1"]
    events = [r for r in WireDecoder().feed(data) if isinstance(r, Event)]
    trials, _ = build_trials(PROTOCOL, events)
    completed = [t for t in trials if t.completed]
    live = snap.live
    assert (snap.animal, snap.session_id, snap.started, snap.ended) == ("wren", 5, 100.0, False)
    assert live.trials == len(completed) and live.hits == sum(t.rewarded for t in completed)
    assert snap.events == len(events) and writer.rows == len(data.splitlines())
    # the rate series: one point per completed trial; its band is the Wilson interval of the last 100
    assert len(snap.series.trial) == len(completed)
    hits = np.array([t.rewarded for t in completed])
    for n in (1, 37, 100, len(completed)):
        window = hits[max(0, n - 100):n]
        low, high = proportion_confint(window.sum(), len(window), alpha=0.05, method="wilson")  # statsmodels
        assert snap.series.rate[n - 1] == pytest.approx(window.mean())
        assert (snap.series.low[n - 1], snap.series.high[n - 1]) == (pytest.approx(low), pytest.approx(high))
    # the histogram of today equals numpy's over the same edges
    expected, _ = np.histogram([t.interval_ms for t in completed], bins=live.linear.edges)  # numpy
    inside = (np.array([t.interval_ms for t in completed]) >= live.linear.edges[0]) & \
             (np.array([t.interval_ms for t in completed]) <= live.linear.edges[-1])
    assert live.linear.today.sum() == inside.sum()
    assert np.array_equal(live.linear.today, expected)
    assert not snap.series.rate.flags.writeable


def test_published_arrays_do_not_change_when_more_trials_arrive(intervals):
    engine, _, fanout = make()
    feed(fanout, session_bytes(intervals[:60]))
    drain(engine)
    first = engine.take_snapshots()["box 1"]
    kept = first.series.rate.copy()
    feed(fanout, session_bytes(intervals[60:], start_ms=1000 + 3000 * 60))
    drain(engine)
    later = engine.take_snapshots()["box 1"]
    assert later.version > first.version and len(later.series.rate) > len(kept)
    assert np.array_equal(first.series.rate, kept, equal_nan=True)
    assert engine.take_snapshots() == {}                    # nothing changed since


def test_batches_of_no_session_count_as_activity_only(intervals):
    engine, _, fanout = make()
    fanout.session_id = 77                                  # a session the engine was never told about
    feed(fanout, session_bytes(intervals[:10]))
    drain(engine)
    snap = engine.take_snapshots()["box 1"]
    assert snap.events > 0 and snap.live.trials == 0


def test_check_out_finishes_the_session_and_check_in_starts_a_new_one(intervals):
    engine, _, fanout = make()
    feed(fanout, session_bytes(intervals[:20]))
    drain(engine)
    engine.close_session("box 1", 5)
    drain(engine)
    ended = engine.take_snapshots()["box 1"]
    assert ended.ended and ended.live.trials > 0
    engine.open_session(SessionPlan("box 1", 6, "lark", PROTOCOL, started=200.0))
    fanout.session_id = 6
    feed(fanout, session_bytes(intervals[:3]))
    drain(engine)
    fresh = engine.take_snapshots()["box 1"]
    assert (fresh.animal, fresh.session_id, fresh.ended) == ("lark", 6, False)
    assert fresh.live.trials == 3


def test_stamps_and_alerts_travel_with_the_batches(intervals):
    engine, _, fanout = make()
    before = time.monotonic()
    feed(fanout, session_bytes(intervals[:30], valve_ms=900))
    drain(engine)
    snap = engine.take_snapshots()["box 1"]
    assert before <= snap.newest_stamp <= time.monotonic()
    alerts = engine.take_alerts()
    assert [a.alert.kind for a in alerts] == ["valve open too long"]       # repeat limit: once
    assert alerts[0].rig == "box 1" and alerts[0].animal == "wren"


def test_disagreement_with_the_rig_is_alerted(intervals):
    engine, _, fanout = make()
    data = session_bytes([650.0, 650.0]).replace(b"outcome hit", b"outcome miss", 1)
    feed(fanout, data, pieces=1)
    drain(engine)
    assert engine.take_snapshots()["box 1"].disagreements == 1
    assert [a.alert.kind for a in engine.take_alerts()] == ["disagreement"]


def test_link_alerts_come_from_the_source_status():
    now = [0.0]
    engine = Engine(publish_s=0.0, check_s=0.0, clock=lambda: now[0])
    current = [status()]
    engine.add_rig("box 2", 2, lambda: current[0])
    engine.step(0)
    current[0] = status(WAITING, gap_since=5.0)
    now[0] = 1.0
    engine.step(0)
    now[0] = 70.0
    engine.step(0)
    assert [a.alert.kind for a in engine.take_alerts()] == ["disconnected", "device gone"]
    assert link_of(status(WAITING)) == "up"               # waiting at start, no gap yet: not a disconnection


def test_engine_thread_publishes_without_being_driven(intervals):
    engine, _, fanout = make({})
    engine.publish_s = 0.02
    engine.start()
    try:
        feed(fanout, session_bytes(intervals[:40]))
        deadline = time.monotonic() + 10
        seen = {}
        while time.monotonic() < deadline:
            seen.update(engine.take_snapshots())
            if "box 1" in seen and seen["box 1"].live.trials == 40:
                break
            time.sleep(0.01)
        assert seen["box 1"].live.trials == 40
    finally:
        engine.stop()
    assert engine.error is None


ADAPTIVE = parse_protocol("""
[protocol]
name = "two-press 650 ms, adaptive"
version = 1
task = "two_press"
target_ms = 650
tolerance = 0.2

[[stages]]
name = "adaptive"
tolerance = 0.35
adaptive = { every = 20, target_rate = 0.5, step = 0.025, min_tolerance = 0.15, max_tolerance = 0.4 }

[[stages]]
name = "final"
""", "adaptive.toml")


def test_the_window_a_box_sent_before_check_in_is_in_force():
    # the box says its stage and window while nobody is checked in; the session opened afterwards carries them
    engine = Engine(publish_s=0.0, check_s=0.0)
    fanout = Fanout(Writer(), source_id=1, session_id=99, live=True, engine=engine.queue)   # 99: no animal
    engine.add_rig("box 1", 1, status)
    decoder = WireDecoder()
    fanout(Batch(decoder.feed(params_bytes(("stage", "adaptive"), ("window_low_ms", "220"),
                                           ("window_high_ms", "660"))), time.time()))
    drain(engine)
    idle = engine.take_snapshots()["box 1"]
    assert [e.args for e in idle.params] == [("stage", "adaptive"), ("window_low_ms", "220"),
                                             ("window_high_ms", "660")]
    engine.open_session(SessionPlan("box 1", 5, "wren", ADAPTIVE, stage="final", started=1.0, carried=idle.params))
    fanout.session_id = 5
    drain(engine)
    snap = engine.take_snapshots()["box 1"]
    # the box's own words win over the check-in's stage and the protocol's window (the rig is the witness)
    assert (snap.live.window_low_ms, snap.live.window_high_ms) == (220.0, 660.0)
    assert snap.window_known
    # a trial at 300 ms is a hit by the box's window (220-660) and a miss by the stage's own (650 ± 35 %)
    body = session_bytes([300.0, 300.0], start_ms=2000, rig_outcomes=False).split(b"\n", 1)[1]
    fanout(Batch(decoder.feed(body), time.time()))
    drain(engine)
    snap = engine.take_snapshots()["box 1"]
    assert snap.live.trials >= 1 and snap.live.hits == snap.live.trials and snap.live.stage == "adaptive"


def test_a_new_header_or_stage_forgets_the_earlier_params():
    engine = Engine(publish_s=0.0, check_s=0.0)
    fanout = Fanout(Writer(), source_id=1, session_id=99, live=True, engine=engine.queue)
    engine.add_rig("box 1", 1, status)
    decoder = WireDecoder()
    fanout(Batch(decoder.feed(params_bytes(("window_low_ms", "220"), ("stage", "final"), ("target_ms", "700"))),
                 time.time()))
    drain(engine)
    assert [e.args[0] for e in engine.take_snapshots()["box 1"].params] == ["stage", "target_ms"]
    fanout(Batch(decoder.feed(b"# rigside-wire 1 clock=us wrap=32\n"), time.time()))
    drain(engine)
    assert engine.take_snapshots()["box 1"].params == ()


def test_no_disagreement_alert_while_the_window_is_a_guess():
    # an adaptive stage whose window the box never sent: rigside's window is its own guess, so a
    # disagreement is counted but not alerted; once the box sends its window, it is alerted
    engine = Engine(publish_s=0.0, check_s=0.0)
    fanout = Fanout(Writer(), source_id=1, session_id=5, live=True, engine=engine.queue)
    engine.add_rig("box 1", 1, status)
    engine.open_session(SessionPlan("box 1", 5, "wren", ADAPTIVE, stage="adaptive", started=1.0))
    decoder = WireDecoder()
    data = session_bytes([650.0, 650.0]).replace(b"outcome hit", b"outcome miss", 1)
    fanout(Batch(decoder.feed(data), time.time()))
    drain(engine)
    snap = engine.take_snapshots()["box 1"]
    assert snap.disagreements == 1 and not snap.window_known
    assert engine.take_alerts() == []
    more = params_bytes(("window_low_ms", "520"), ("window_high_ms", "780"), header=False)
    more += session_bytes([650.0], start_ms=9000).split(b"\n", 1)[1].replace(b"outcome hit", b"outcome miss")
    fanout(Batch(decoder.feed(more), time.time()))
    drain(engine)
    assert engine.take_snapshots()["box 1"].window_known
    assert [a.alert.kind for a in engine.take_alerts()] == ["disagreement"]


def test_a_box_streaming_with_nobody_checked_in_is_counted_and_alerted_once():
    engine = Engine(publish_s=0.0, check_s=0.0)
    fanout = Fanout(Writer(), source_id=1, session_id=99, live=True, engine=engine.queue)    # no animal
    engine.add_rig("box 1", 1, status)
    decoder = WireDecoder()
    fanout(Batch(decoder.feed(session_bytes([650.0, 700.0, 640.0], rig_outcomes=False)), time.time()))
    drain(engine)
    snap = engine.take_snapshots()["box 1"]
    assert snap.session_id is None and snap.unattended_events == 9      # 3 trial starts + 6 presses
    assert [a.alert.kind for a in engine.take_alerts()] == ["nobody checked in"]
    fanout(Batch(decoder.feed(session_bytes([650.0], start_ms=20_000).split(b"\n", 1)[1]), time.time()))
    drain(engine)
    assert engine.take_alerts() == []                                   # once per stretch
    engine.forget_unattended("box 1")
    drain(engine)
    assert engine.take_snapshots()["box 1"].unattended_events == 0
    engine.open_session(SessionPlan("box 1", 5, "wren", PROTOCOL, started=1.0))
    fanout.session_id = 5
    fanout(Batch(decoder.feed(session_bytes([650.0] * 4, start_ms=40_000).split(b"\n", 1)[1]), time.time()))
    drain(engine)
    assert engine.take_snapshots()["box 1"].unattended_events == 0 and engine.take_alerts() == []
