"""monitor.app.live.fraction and the engine: every completed trial reaches the cached filter once, in order."""

from __future__ import annotations

import json
import math
import time

import numpy as np
import pytest

from drivers.status import Batch
from drivers.wire import WireDecoder, decode_all
from monitor.app.live.engine import Engine, SessionPlan
from monitor.app.live.fraction import FractionFollower, live_text
from monitor.app.live.pipeline import Fanout
from monitor.core.consolidation.live import LiveSetup, LiveFilter, filter_state, restore_filter
from monitor.core.session.live_stats import LiveSession
from fixtures.protocols import two_press
from fixtures.sessions import session_bytes

PARAMS = {"a_f": 0.95, "b_f": 0.05, "c": 1.2e-3, "slow_leak": 1e-5, "tau_b": 20.0, "q_f": 1e-3, "q_s": 1e-5}
PROTOCOL = two_press(plateau_sessions=3, min_trials=5)


def cached_state(ended_at: float | None) -> dict:
    """A cached filter as the store keeps it (JSON), part-way through learning."""
    live = LiveFilter(LiveSetup(PARAMS, "error", True, np.array([-0.3, 0.0, 0.0, 0.0]), 0.01, below=0.1, above=0.1,
                                status="estimated"), np.array([-0.1, -0.2]), np.eye(2) * 1e-3, -0.25)
    return json.loads(json.dumps({**filter_state(live), "ended_at": ended_at}))


def by_hand(cached: dict, hours: float, intervals: list[float]) -> LiveFilter:
    """The same filter run over all the trials at once: y = log(interval / 650 ms), rewarded within ±130 ms."""
    live = restore_filter(cached)
    live.start_session(hours)
    for interval in intervals:
        live.add_trial(math.log(interval / 650.0), abs(interval - 650) <= 130)
    return live


def session_trials(intervals: list[float]) -> list:
    session = LiveSession(PROTOCOL)
    for record in decode_all(session_bytes(intervals)):
        if hasattr(record, "name"):
            session.feed(record)
    session.finish()
    return session.trials


def test_each_completed_trial_is_fed_once_in_order():
    rng = np.random.default_rng(5)
    intervals = [float(v) for v in rng.normal(650, 80, 40).clip(300, 1200).round()]
    cached = cached_state(ended_at=1_000_000.0)
    follower = FractionFollower(cached, "main", 1_000_000.0 + 22 * 3600)
    for trial in session_trials(intervals):     # one trial at a time, as the engine hands them over
        follower.add([trial])
    assert follower.fraction == by_hand(cached, 22.0, intervals).fraction()
    assert follower.fraction.trials_since_fit == len(intervals)
    assert "40 new trials, not refitted" in live_text(follower.fraction, 21)


def test_nothing_to_follow_outside_the_final_stage():
    follower = FractionFollower(cached_state(0.0), "final", 3600.0)
    follower.add(session_trials([650.0, 700.0]))
    assert follower.fraction is None


@pytest.mark.parametrize("ended_at, start, hours", [(None, 5.0, 23.0), (100.0, 50.0, 23.0), (0.0, 7200.0, 2.0)])
def test_the_break_is_the_time_since_the_fitted_session_ended(ended_at, start, hours):
    cached = cached_state(ended_at)
    follower = FractionFollower(cached, "main", start)
    follower.add(session_trials([640.0]))
    assert follower.fraction == by_hand(cached, hours, [640.0]).fraction()


class Writer:
    def submit(self, batch, *, source_id, session_id, live) -> None:
        pass


@pytest.mark.parametrize("follow_after", [0, 70])
def test_the_engine_misses_no_trial_however_fast_they_come(follow_after):
    """130 trials (more than a snapshot keeps) arrive between two looks; the fit may be told part-way through."""
    intervals = [650.0 + (k % 7) * 10 - 30 for k in range(130)]
    wall0, mono0 = 1_000_000.0 + 30 * 3600, 500.0
    now = {"mono": mono0}
    engine = Engine(publish_s=0.0, check_s=0.0, clock=lambda: now["mono"],
                    wall=lambda: wall0 + (now["mono"] - mono0))
    fanout = Fanout(Writer(), source_id=1, session_id=5, live=True, engine=engine.queue)
    engine.add_rig("box 1", 1)
    engine.open_session(SessionPlan("box 1", 5, "wren", PROTOCOL, started=mono0))
    cached = cached_state(ended_at=1_000_000.0)
    records = WireDecoder().feed(session_bytes(intervals))
    cut = next(k for k, r in enumerate(records) if sum(t.completed for t in session_trials_of(records[:k])) >=
               follow_after) if follow_after else 0
    if not follow_after:
        engine.follow("box 1", 5, cached, "main")
    fanout(Batch(records[:cut], time.time()))
    now["mono"] += 0.01
    engine.step(0)
    if follow_after:
        engine.follow("box 1", 5, cached, "main")       # the fit arrives while the session runs
    for k in range(cut, len(records), 3):             # many small batches, queued before the engine wakes
        fanout(Batch(records[k:k + 3], time.time()))
    while not engine.queue.empty():                   # the engine's turns; the screen looks once, at the end
        engine.step(0)
    engine.step(0)
    snapshot = engine.take_snapshots()["box 1"]       # the latest-value slot: only the newest snapshot is left
    kept = len(snapshot.live.recent_intervals_ms)
    assert kept < len(intervals)                      # the snapshot's own arrays could not have carried them all
    expected = by_hand(cached, 30.0, intervals).fraction()   # the break: session start minus the fit's end
    assert snapshot.fraction == expected and snapshot.fraction.trials_since_fit == len(intervals)


def session_trials_of(records) -> list:
    session = LiveSession(PROTOCOL)
    for record in records:
        if hasattr(record, "name"):
            session.feed(record)
    return session.trials
