"""Trial spans from the rig's own framing: a worked session in the wire format's example (docs/wire-format.md)
and a rig without framing, checked against the segmentation's own trials."""

from __future__ import annotations

from drivers.wire import WireDecoder
from fixtures.protocols import two_press
from fixtures.sessions import CONTRACT_EXAMPLE
from monitor.core.session.trial_spans import trial_spans
from monitor.core.session.trials import TrialBuilder

PROTOCOL = two_press(trial_timeout_ms=3000)

# the wire format's own example session (docs/wire-format.md), then a lone press and an omission
FRAMED = b"".join(CONTRACT_EXAMPLE.splitlines(keepends=True)[:8]) + b"""2000000 trial_start
2100000 lever_down
2200000 lever_up
5100000 outcome lone
6000000 trial_start
9000000 outcome omission
"""

UNFRAMED = b"""# rigside-wire 1 clock=us wrap=32 fw=old-v1
1000000 lever_down
1100000 lever_up
1700000 lever_down
1800000 lever_up
9000000 lever_down
9100000 lever_up
20000000 lever_down
"""


def spans_of(data: bytes) -> tuple[list, list[tuple[int, int]]]:
    events = [r for r in WireDecoder().feed(data) if hasattr(r, "name")]
    builder = TrialBuilder(PROTOCOL)
    trials, origin = [], events[0].t_us
    for event in events:
        trials.extend(builder.feed(event))
    trials.extend(builder.flush())
    starts = [e.t_us - origin for e in events if e.name == "trial_start"]
    outcomes = [e.t_us - origin for e in events if e.name == "outcome"]
    return trials, trial_spans(trials, starts, outcomes, lambda t: 3_000_000)


def test_framed_trials_run_from_trial_start_to_the_rigs_outcome():
    trials, spans = spans_of(FRAMED)
    assert [t.outcome for t in trials] == ["hit", "lone", "omission"]
    origin = 1048576  # µs of the first event: times are session-relative
    assert spans == [(0, 1713000 - origin), (2000000 - origin, 5100000 - origin), (6000000 - origin, 9000000 - origin)]


def test_unframed_trials_end_at_the_second_press_or_the_timeout():
    trials, spans = spans_of(UNFRAMED)
    assert [t.outcome for t in trials] == ["hit", "lone", "lone"]
    # 600 ms pair (a hit of the 650 ms +-20 % window); lone presses end trial_timeout_ms (3 s) after the press
    assert spans == [(0, 700000), (8000000, 11000000), (19000000, 22000000)]
    assert all(end > begin for begin, end in spans)
