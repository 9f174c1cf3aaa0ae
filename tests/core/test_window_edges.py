"""Reward-window edges are decided exactly: an interval on an edge is a hit on ms and µs clocks.

650 ms x (1 + 0.15) is 747.5 ms and 800 ms x 1.15 is 920 ms, but in binary floating point
650 * 1.15 = 747.4999... and 800 * 1.15 = 919.9999... (IEEE 754 double rounding, common practice);
the exact values are checked with Python's `fractions` (the reference for exact rationals).
"""

from __future__ import annotations

from fractions import Fraction

import pytest

from drivers.wire import Event, decode_all, encode_event, encode_header
from monitor.core.protocol import exact, parse_protocol, tolerance_edges
from monitor.core.session.summary import figures
from monitor.core.session.trials import build_trials

PROTOCOL = """
[protocol]
name = "edges"
version = 1
task = "two_press"
target_ms = {target}
tolerance = 0.15
trial_timeout_ms = 3000

[plateau]
rule = "consecutive_sessions"
min_hit_rate = 0.5
sessions = 3
"""


def _events(clock: str, durations: list[int], rig_words: list[str] | None = None,
            params: tuple[tuple[str, str], ...] = ()) -> list[Event]:
    """Press pairs `durations` apart (in the clock's own ticks), 10 s between pairs."""
    tick = 1000 if clock == "ms" else 1_000_000
    lines = [encode_header(clock=clock, fw="edge-test")]
    lines += [encode_event(1, "param", name, value) for name, value in params]
    for i, d in enumerate(durations):
        t0 = 10 + 10 * tick * (i + 1)
        lines += [encode_event(t0, "lever_down"), encode_event(t0 + d, "lever_down")]
        if rig_words is not None:
            lines.append(encode_event(t0 + d + 5, "outcome", rig_words[i]))
    return [r for r in decode_all(b"".join(lines)) if isinstance(r, Event)]


def test_float_products_miss_the_edge_but_the_exact_edges_do_not():
    # IEEE 754 (common practice): the float products fall just below the decimal edges.
    assert 650 * 1.15 < 747.5 and 800 * 1.15 < 920
    # Python's fractions: the exact window of the numbers as written.
    assert tolerance_edges(650, 0.15) == (Fraction(1105, 2), Fraction(1495, 2))
    assert tolerance_edges(800, 0.15) == (Fraction(680), Fraction(920))
    assert exact(0.15) == Fraction(3, 20)
    p = parse_protocol(PROTOCOL.format(target=650), "p.toml")
    assert (p.final_stage.window_low_ms, p.final_stage.window_high_ms) == (552.5, 747.5)


@pytest.mark.parametrize("target, clock, durations, expected", [
    (650, "us", [747_500, 747_501, 552_500, 552_499, 747_499], ["hit", "miss", "hit", "miss", "hit"]),
    (650, "ms", [747, 748, 553, 552], ["hit", "miss", "hit", "miss"]),
    (800, "us", [920_000, 920_001, 919_999, 680_000, 679_999], ["hit", "miss", "hit", "hit", "miss"]),
    (800, "ms", [920, 921, 680, 679], ["hit", "miss", "hit", "miss"]),
])
def test_edges_count_as_hits_and_agree_with_the_rig(target, clock, durations, expected):
    protocol = parse_protocol(PROTOCOL.format(target=target), "p.toml")
    trials, builder = build_trials(protocol, _events(clock, durations))
    assert [t.computed_outcome for t in trials] == expected
    # A rig that judged the same trials by the documented rule (edges inside) never disagrees.
    trials, builder = build_trials(protocol, _events(clock, durations, expected))
    assert [t.outcome_source for t in trials] == ["rig"] * len(expected)
    assert builder.counts["disagreements"] == 0 and builder.disagreements == []


@pytest.mark.parametrize("clock, on_edge", [("us", 920_000), ("ms", 920)])
def test_edges_set_by_the_rig_are_exact_too(clock, on_edge):
    protocol = parse_protocol(PROTOCOL.format(target=700), "p.toml")
    for params in ((("target_ms", "800"),), (("target_ms", "800"), ("tolerance", "0.15")),
                   (("window_low_ms", "680"), ("window_high_ms", "920"))):
        trials, builder = build_trials(protocol, _events(clock, [on_edge], ["hit"], params))
        assert trials[0].computed_outcome == "hit" and builder.counts["disagreements"] == 0


def test_adaptive_steps_land_on_exact_tolerances():
    text = PROTOCOL.format(target=800).replace(
        "tolerance = 0.15", "tolerance = 0.2\nadaptive = { every = 2, target_rate = 0.4, step = 0.05, "
                            "min_tolerance = 0.05, max_tolerance = 0.5 }")
    protocol = parse_protocol(text, "p.toml")
    # Two hits at a 0.2 tolerance step it down to 0.15 (0.2 - 0.05 in floats is 0.15000000000000002).
    trials, _ = build_trials(protocol, _events("us", [800_000, 800_000, 920_000, 920_001]))
    assert [t.computed_outcome for t in trials] == ["hit", "hit", "hit", "miss"]
    assert trials[2].window_high_ms == 920.0


def test_fixed_window_fraction_counts_the_edge():
    protocol = parse_protocol(PROTOCOL.format(target=650), "p.toml")
    trials, _ = build_trials(protocol, _events("us", [747_500, 747_501]))
    result = figures(trials, protocol.fixed_window(protocol.final_stage.name))
    assert result.fixed_window_fraction == 0.5
