"""monitor.app.live.fraction: the session's trials reach the cached filter once each, in order."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest

from drivers.wire import decode_all
from monitor.app.live.fraction import LiveFractions, live_text
from monitor.core.consolidation.live import LiveSetup, LiveFilter, filter_state, restore_filter
from monitor.core.session.live_stats import LiveSession
from fixtures.protocols import two_press
from fixtures.sessions import session_bytes

PARAMS = {"a_f": 0.95, "b_f": 0.05, "c": 1.2e-3, "slow_leak": 1e-5, "tau_b": 20.0, "q_f": 1e-3, "q_s": 1e-5}


def cached_state(ended_at: float) -> dict:
    """A cached filter as the store keeps it (JSON), part-way through learning."""
    live = LiveFilter(LiveSetup(PARAMS, "error", True, np.array([-0.3, 0.0, 0.0, 0.0]), 0.01, below=0.1, above=0.1,
                                status="estimated"), np.array([-0.1, -0.2]), np.eye(2) * 1e-3, -0.25)
    return json.loads(json.dumps({**filter_state(live), "ended_at": ended_at}))


def live_session(intervals: list[float]) -> tuple[LiveSession, list]:
    """A LiveSession and the events of a two-press session of our own."""
    protocol = two_press(plateau_sessions=3, min_trials=5)
    return LiveSession(protocol), [r for r in decode_all(session_bytes(intervals)) if hasattr(r, "name")]


def by_hand(cached: dict, hours: float, intervals: list[float]) -> LiveFilter:
    """The same filter fed the same trials directly."""
    live = restore_filter(cached)
    live.start_session(hours)
    for interval in intervals:
        live.add_trial(math.log(interval / 650.0), abs(interval - 650) <= 130)
    return live


def test_each_completed_trial_is_fed_once_in_order():
    rng = np.random.default_rng(5)
    intervals = [float(v) for v in rng.normal(650, 80, 40).clip(300, 1200).round()]
    cached = cached_state(ended_at=1_000_000.0)
    start = 1_000_000.0 + 22 * 3600
    session, events = live_session(intervals)
    fractions = LiveFractions()
    seen = []
    for k, event in enumerate(events):       # a look after every event: most looks find nothing new
        session.feed(event)
        got = fractions.update("heron", 7, session.snapshot(), cached, "main", start)
        if got is not None and (not seen or got[0] is not seen[-1]):
            seen.append(got[0])
    session.finish()
    fraction, missed = fractions.update("heron", 7, session.snapshot(), cached, "main", start)
    expected = by_hand(cached, 22.0, intervals)
    assert missed == 0 and fraction.trials_since_fit == len(intervals) == len(seen)
    assert fraction == expected.fraction()
    assert "40 new trials, not refitted" in live_text(fraction, missed, 21)


def test_trials_beyond_what_the_snapshot_keeps_are_counted_as_missed():
    intervals = [650.0 + (k % 7) * 10 for k in range(130)]
    session, events = live_session(intervals)
    for event in events:
        session.feed(event)
    session.finish()
    cached = cached_state(ended_at=0.0)
    fraction, missed = LiveFractions().update("heron", 7, session.snapshot(), cached, "main", 3600.0 * 30)
    kept = len(session.snapshot().recent_intervals_ms)
    assert missed == len(intervals) - kept and fraction.trials_since_fit == kept
    assert "trials came too fast to follow" in live_text(fraction, missed, 21)


def test_nothing_to_follow_without_a_cached_filter_or_outside_the_final_stage():
    session, events = live_session([650.0, 700.0])
    for event in events:
        session.feed(event)
    fractions = LiveFractions()
    assert fractions.update("heron", 7, session.snapshot(), None, "main", 0.0) is None
    assert fractions.update("heron", 7, session.snapshot(), cached_state(0.0), "final", 0.0) is None


@pytest.mark.parametrize("ended_at, start, hours", [(None, 5.0, 23.0), (100.0, 50.0, 23.0), (0.0, 7200.0, 2.0)])
def test_the_break_is_the_time_since_the_fitted_session_ended(ended_at, start, hours):
    session, events = live_session([640.0])
    for event in events:
        session.feed(event)
    session.finish()
    cached = {**cached_state(0.0), "ended_at": ended_at}
    fraction, _ = LiveFractions().update("heron", 7, session.snapshot(), cached, "main", start)
    assert fraction == by_hand(cached, hours, [640.0]).fraction()
