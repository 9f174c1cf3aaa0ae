"""monitor.core.session.derivation: a recorded session derived in one pass equals the box's own tally."""

from __future__ import annotations

import pytest

from drivers.wire import Event, decode_all
from fixtures.protocols import protocol_toml
from fixtures.sessions import session_bytes
from monitor.core.protocol import parse_protocol
from monitor.core.session.derivation import derive_session
from monitor.core.session.live_stats import LiveSession

pytestmark = pytest.mark.slow  # a simulated history: seconds


def test_derived_sessions_match_the_simulated_boxes_own_counts(mock_history):
    out, truth = mock_history
    for animal, data in truth["animals"].items():
        protocol = parse_protocol((out / f"{animal}.protocol.toml").read_text())
        for session in data["sessions"]:
            events = [r for r in decode_all((out / session["file"]).read_bytes()) if type(r) is Event]
            trials, counts, water = derive_session(protocol, None, None, events)
            completed = [t for t in trials if t.completed]
            # truth.json is written by mock_rig from the box's own decisions, not by the segmentation under test
            assert len(completed) == session["trials"]
            assert sum(t.rewarded for t in completed) == session["hits"]
            assert sum(t.outcome == "premature" for t in trials) == session["premature"]
            assert water == pytest.approx(session["water_ul"])
            assert counts["inter_trial"] == session["inter_trial_presses"]
            # the live view's session gives the same trials, counts and water for the same events
            live = LiveSession(protocol)
            for event in events:
                live.feed(event)
            live.finish()
            assert (live.trials, dict(live.builder.counts), live.stats.water_ul) == (trials, counts, water)


def test_water_counts_valve_time_only_with_a_calibration():
    protocol = parse_protocol(protocol_toml())
    events = [r for r in decode_all(session_bytes([650, 650, 2000], valve_ms=30)) if type(r) is Event]
    # two hits, each opening the valve 30 ms: 2 x 30 ms x 0.1 uL/ms (arithmetic on the session we wrote)
    assert derive_session(protocol, None, 0.1, events)[2] == pytest.approx(6.0)
    assert derive_session(protocol, None, None, events)[2] == 0.0
