"""Trial segmentation: the rig as witness, the documented fallback rules, and robustness."""

from __future__ import annotations

import pytest
import math

from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from drivers.wire import Event, WireDecoder, decode_all
from fixtures.sessions import CONTRACT_EXAMPLE
from monitor.core.protocol import parse_protocol
from monitor.core.session.trials import NOT_TRIALS, TrialBuilder, build_trials

# BASIC: target 700 ms, tolerance 0.2 -> window [560, 840] ms, timeout 3000 ms


def run(protocol, evs, stage=None):
    trials, builder = build_trials(protocol, evs, stage)
    return trials, builder


def test_fallback_pairs_presses_and_edges_count_as_hits(basic, events):
    evs = events((0, "lever_down"), (50, "lever_up"), (560, "lever_down"), (600, "lever_up"),
                 (5000, "lever_down"), (5840, "lever_down"),
                 (10000, "lever_down"), (10559.999, "lever_down"),
                 (20000, "lever_down"), (20840.001, "lever_down"))
    trials, _ = run(basic, evs)
    assert [(t.outcome, t.outcome_source) for t in trials] == [("hit", "computed")] * 2 + [("miss", "computed")] * 2
    assert [t.interval_ms for t in trials] == [560.0, 840.0, 559.999, 840.001]
    first = trials[0]
    assert (first.index, first.t_us, first.target_ms) == (1, 0, 700.0)
    assert (first.window_low_ms, first.window_high_ms, first.stage) == (560.0, 840.0, "main")
    assert first.rewarded and first.computed_outcome == "hit" and first.completed
    assert trials[3].t_us == 20_000_000


def test_lone_press_after_timeout_and_pairing_at_the_timeout(basic, events):
    evs = events((0, "lever_down"), (3000.001, "lever_down"), (6000.001, "lever_down"),  # 3000 ms exactly: a pair
                 (20000, "lever_down"))
    trials, builder = run(basic, evs)
    assert [t.outcome for t in trials] == ["lone", "miss", "lone"]
    assert trials[0].t_us == 0 and math.isnan(trials[0].interval_ms) and not trials[0].completed
    assert trials[1].interval_ms == 3000.0
    assert trials[2].t_us == 20_000_000  # closed at the end of the session
    assert builder.counts["lone"] == 2 and builder.counts["trials"] == 1


def test_premature_and_inter_trial_presses_are_counted_apart(basic_text, events):
    p = parse_protocol(basic_text.replace("trial_timeout_ms = 3000", "trial_timeout_ms = 3000\niti_ms = 2000\n"
                                     "premature_ms = 200"), "p.toml")
    evs = events((0, "lever_down"), (150, "lever_down"),  # premature pair; the ITI runs until 2150
                 (1000, "lever_down"),  # inter-trial
                 (2200, "lever_down"), (2900, "lever_down"),  # hit, ITI until 4900
                 (3000, "lever_down"), (4899, "lever_down"),  # inter-trial
                 (4900, "lever_down"), (5600, "lever_down"))  # hit
    trials, builder = run(p, evs)
    assert [t.outcome for t in trials] == ["premature", "hit", "hit"]
    assert builder.counts["inter_trial"] == 3 and builder.counts["premature"] == 1


def test_rig_outcome_is_the_truth_and_disagreements_are_kept(basic, events):
    evs = events((0, "trial_start"), (100, "lever_down"), (800, "lever_down"), (801, "outcome", "hit"),
                 (900, "reward", 30), (1000, "lever_down"),  # between trials: inter-trial
                 (2000, "trial_start"), (2100, "lever_down"), (2750, "lever_down"), (2751, "outcome", "miss"),
                 (4000, "trial_start"), (7100, "outcome", "omission"),
                 (8000, "trial_start"), (8100, "lever_down"), (11200, "outcome", "lone"))
    trials, builder = run(basic, evs)
    got = [(t.outcome, t.computed_outcome, t.outcome_source, t.rewarded) for t in trials]
    assert got == [("hit", "hit", "rig", True), ("miss", "hit", "rig", False),
                   ("omission", "omission", "rig", False), ("lone", "lone", "rig", False)]
    assert trials[0].interval_ms == 700.0 and trials[2].t_us == 4_000_000
    assert builder.counts["disagreements"] == 1 and builder.disagreements == [(2, "miss", "hit")]
    assert builder.counts["inter_trial"] == 1


def test_contract_example_stream(basic_text):
    # docs/wire-format.md, the example lines verbatim; protocol of docs/protocol.md (650 ms, tolerance 0.2)
    p = parse_protocol(basic_text.replace("700", "650"), "p.toml")
    evs = [r for r in decode_all(CONTRACT_EXAMPLE) if isinstance(r, Event)]
    trials, builder = run(p, evs)
    assert len(trials) == 1
    t = trials[0]
    assert t.outcome == "hit" and t.outcome_source == "rig" and t.computed_outcome == "hit"
    assert t.interval_ms == (1712004 - 1048900) / 1000
    assert t.t_us == 1048900 - 1048576  # session-relative: from the stream's first event
    assert builder.counts["disagreements"] == 0


def test_params_change_the_window_and_stage_in_force(basic_text, events):
    p = parse_protocol(basic_text + """
[[stages]]
name = "wide"
tolerance = 0.5
[[stages]]
name = "final"
""", "p.toml")
    evs = events((0, "lever_down"), (1000, "lever_down"),  # wide: [350, 1050] -> hit
                 (2000, "param", "window_high_ms", 900),
                 (3000, "lever_down"), (4000, "lever_down"),  # wide with high edge 900 -> miss
                 (5000, "param", "stage", "final"),
                 (6000, "lever_down"), (6600, "lever_down"),  # final: [560, 840] -> hit
                 (7000, "param", "target_ms", 600),
                 (8000, "lever_down"), (8700, "lever_down"),  # target 600, tolerance 0.2 -> [480, 720]
                 (9000, "param", "volume", "loud"), (9100, "param", "target_ms", "-5"))
    trials, builder = run(p, evs)
    assert [(t.stage, t.outcome) for t in trials] == [("wide", "hit"), ("wide", "miss"), ("final", "hit"),
                                                      ("final", "hit")]
    assert trials[1].window_high_ms == 900 and trials[3].window_low_ms == 480 and trials[3].target_ms == 600
    assert builder.other_params == {"volume": "loud"} and builder.counts["bad_param"] == 1
    assert builder.stage == "final"


def test_a_board_reset_never_pairs_presses_across_it(basic, events):
    evs = events((0, "lever_down"), "RESET", (10, "lever_down"), (710, "lever_down"))
    trials, builder = run(basic, evs)
    assert [t.outcome for t in trials] == ["lone", "hit"]
    assert trials[1].segment == trials[0].segment + 1 and trials[1].t_us >= trials[0].t_us
    assert builder.counts["segments"] == 1


def test_missing_releases_extra_presses_unknown_events_never_crash(basic, events):
    evs = events((0, "lever_down"), (10, "lever_down", 2), (20, "lever_up", 3), (700, "lever_down"),
                 (800, "buzz", "x"), (900, "joystick", 5))
    records = decode_all(b"garbage line\n# a comment\n") + evs
    builder = TrialBuilder(basic)
    out = []
    for record in records:
        out += builder.feed(record)
    out += builder.flush()
    # onsets pair in order, whatever the lever: 0 and 10 ms make a premature-free miss, 700 is lone
    assert [t.outcome for t in out] == ["miss", "lone"]
    assert builder.counts["missing_release"] == 1 and builder.counts["unmatched_release"] == 1
    assert builder.counts["unknown_event"] == 1 and builder.counts["non_event"] == 2
    assert builder.counts["joystick_ignored"] == 1


def test_outcome_only_rig_waits_for_the_word(basic, events):
    evs = events((0, "lever_down"), (700, "lever_down"), (701, "outcome", "hit"),
                 (2000, "lever_down"), (2300, "lever_down"), (2301, "outcome", "correct"),
                 (4000, "lever_down"), (4650, "lever_down"),  # the rig forgot this one
                 (6000, "lever_down"), (6700, "lever_down"), (6701, "outcome", "hit"))
    trials, builder = run(basic, evs)
    got = [(t.outcome, t.outcome_source) for t in trials]
    assert got == [("hit", "rig"), ("correct", "rig"), ("hit", "computed"), ("hit", "rig")]
    assert builder.counts["missing_outcome"] == 1
    assert builder.disagreements == [(2, "correct", "miss")]  # a lab word is compared as it is


def test_joystick_hold_from_threshold_crossings(events):
    p = parse_protocol("""
[protocol]
name = "hold"
version = 1
task = "joystick_hold"
target_ms = 500
window_ms = [500, 5000]
threshold_deg = 12
min_hold_ms = 30
""", "j.toml")
    evs = events((0, "joystick", 0), (100, "joystick", 8, 9),  # |(8, 9)| = 12.04 >= 12: crossing
                 (300, "joystick", 20), (650, "joystick", 3),  # hold 550 ms -> hit
                 (1000, "joystick", -15), (1010, "joystick", 0),  # 10 ms: jitter, ignored
                 (2000, "joystick", 13), (2400, "joystick", 11.9),  # 400 ms -> miss
                 (3000, "joystick", 30))  # never released
    trials, builder = run(p, evs)
    assert [(t.outcome, t.interval_ms) for t in trials] == [("hit", 550.0), ("miss", 400.0)]
    assert trials[0].t_us == 100_000
    assert builder.counts["short_push"] == 1 and builder.counts["open_at_end"] == 1


def test_adaptive_window_steps_in_the_fallback(events):
    p = parse_protocol("""
[protocol]
name = "adapt"
version = 1
task = "two_press"
target_ms = 1000
tolerance = 0.3
adaptive = { every = 4, target_rate = 0.5, step = 0.1, min_tolerance = 0.1, max_tolerance = 0.5 }
""", "a.toml")
    items = []
    for i in range(8):  # every interval 1250 ms: a hit while the tolerance is >= 0.25
        items += [(i * 10000, "lever_down"), (i * 10000 + 1250, "lever_down")]
    trials, _ = run(p, events(*items))
    # 4 hits at 0.3 -> rate 1 > 0.5 -> tolerance 0.2: the next four are misses
    assert [t.outcome for t in trials] == ["hit"] * 4 + ["miss"] * 4
    assert trials[4].window_high_ms == 1200.0


def _trials_via(data: bytes, mode: str, protocol):
    decoder = WireDecoder()
    records = []
    if mode == "whole":
        records = decoder.feed(data)
    else:
        for i in range(len(data)):
            records += decoder.feed(data[i : i + 1])
    records += decoder.close()
    return build_trials(protocol, [r for r in records if isinstance(r, Event)])[0]


def test_three_ways_same_trials(basic, stream):
    # whole input, byte by byte, and a trailing partial line (three ways, common practice for sans-I/O parsers)
    data = stream((0, "trial_start"), (100, "lever_down"), (800, "lever_down"), (801, "outcome", "hit"),
                  (1900, "trial_start"), (2000, "lever_down"), (2600, "lever_down"))
    whole = _trials_via(data, "whole", basic)
    assert whole == _trials_via(data, "bytes", basic)
    partial = _trials_via(data + b"2700 lever_do", "whole", basic)  # the unfinished line is malformed, not fatal
    assert partial == whole and len(whole) == 2


WORDS = ["lever_down", "lever_up", "trial_start", "outcome", "param", "reward", "lick", "joystick", "mystery", "RESET"]


@st.composite
def event_lists(draw):
    items, t = [], 0.0
    for _ in range(draw(st.integers(0, 60))):
        t += draw(st.sampled_from([0, 1, 50, 300, 700, 1000, 3500]))
        word = draw(st.sampled_from(WORDS))
        if word == "RESET":
            items.append("RESET")
        elif word == "outcome":
            items.append((t, word, draw(st.sampled_from(["hit", "miss", "lone", "omission", "premature", "odd"]))))
        elif word == "param":
            items.append((t, word, draw(st.sampled_from(["window_low_ms", "stage", "target_ms", "x"])),
                          draw(st.sampled_from(["500", "main", "nope", "700"]))))
        elif word == "joystick":
            items.append((t, word, draw(st.sampled_from([0, 20]))))
        else:
            items.append((t, word))
    return items


@pytest.mark.slow
@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(items=event_lists())
def test_any_stream_gives_consistent_records(basic, events, items):
    p = basic
    trials, builder = build_trials(p, events(*items))
    assert [t.index for t in trials] == list(range(1, len(trials) + 1))
    for t in trials:
        assert t.outcome_source in ("rig", "computed")
        assert t.completed == (t.outcome not in NOT_TRIALS)
        if t.computed_outcome in ("hit", "miss"):
            assert (t.window_low_ms <= t.interval_ms <= t.window_high_ms) == (t.computed_outcome == "hit")
        if t.outcome_source == "computed":
            assert t.outcome == t.computed_outcome and t.rewarded == (t.outcome == "hit")
    assert builder.counts["trials"] == sum(t.completed for t in trials)
    assert builder.counts["disagreements"] == len(builder.disagreements)


def test_fallback_trial_is_released_after_the_grace(basic, events):
    builder = TrialBuilder(basic)
    evs = events((0, "lever_down"), (700, "lever_down"), (750, "lever_up"), (1201, "lick"))
    assert [len(builder.feed(e)) for e in evs] == [0, 0, 0, 1]  # released 500 ms after the second press
    assert builder.flush() == []


def test_session_end_closes_open_attempts(basic, events):
    builder = TrialBuilder(basic)
    out = []
    for e in events((0, "trial_start"), (10, "lever_down"), (20, "session_end")):
        out += builder.feed(e)
    assert [(t.outcome, t.outcome_source) for t in out] == [("lone", "computed")]
    assert builder.counts["missing_outcome"] == 1


def reference_pairs(segments, timeout_ms):
    """A plain batch reading of the documented rule: pair onsets in order within the timeout, per segment."""
    out = []
    for presses in segments:
        i = 0
        while i < len(presses):
            if i + 1 < len(presses) and presses[i + 1] - presses[i] <= timeout_ms:
                out.append((presses[i], round(presses[i + 1] - presses[i], 6)))
                i += 2
            else:
                out.append((presses[i], None))
                i += 1
    return out


@pytest.mark.slow
@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(gaps=st.lists(st.lists(st.integers(1, 5000), max_size=25), min_size=1, max_size=4))
def test_incremental_pairing_equals_a_batch_reading(basic, events, gaps):
    segments, items = [], []
    for n, seg in enumerate(gaps):
        if n:
            items.append("RESET")
        t, presses = 0, []
        for gap in seg:
            t += gap
            presses.append(t)
            items.append((t, "lever_down"))
        segments.append(presses)
    trials, _ = build_trials(basic, events(*items))
    got = [None if math.isnan(tr.interval_ms) else round(tr.interval_ms, 6) for tr in trials]
    assert got == [interval for _, interval in reference_pairs(segments, 3000)]
