"""Tasks as the box runs them: trial structure, the box's verdicts re-derived from
the decoded bytes, shaping, the adaptive window, older firmware, the joystick task,
and the device counter."""

from datetime import datetime, timezone

import numpy as np
import pytest

from drivers.wire import Event, Header, Malformed, decode_all
from mock_rig import scenario
from mock_rig.history import Animal, run_session, train
from mock_rig.learner import Learner, LearnerParams
from mock_rig.rig import Board, BoardConfig, wrap_soon
from mock_rig.tasks import ScenarioProtocol, Session, Stage

WALL = datetime(2026, 2, 2, 9, 0, tzinfo=scenario.LAB_TZ)


def animal(seed=1, protocol=None, board=None, params=None) -> Animal:
    rng = np.random.default_rng(seed)
    return Animal(
        "test",
        protocol or scenario.two_press_protocol(650),
        Learner(params or LearnerParams(), rng),
        rng,
        board or BoardConfig(),
    )


def events(data: bytes) -> list[Event]:
    records = decode_all(data)
    assert not [r for r in records if isinstance(r, Malformed)]
    return [r for r in records if isinstance(r, Event)]


def rederive(evs: list[Event]):
    """The box's verdicts recomputed from the bytes: hit iff press-onset interval in window."""
    window = {}
    presses: list[int] = []
    verdicts = []
    for e in evs:
        if e.name == "param":
            window[e.args[0]] = e.args[1]
        elif e.name == "trial_start":
            presses = []
        elif e.name == "lever_down":
            presses.append(e.t_us)
        elif e.name == "outcome" and e.args[0] in ("hit", "miss"):
            interval = presses[-1] - presses[-2]
            inside = int(window["window_low_ms"]) * 1000 <= interval <= int(window["window_high_ms"]) * 1000
            verdicts.append((e.args[0], inside))
    return verdicts


def test_session_bytes_decode_cleanly_and_verdicts_follow_the_window():
    a = animal()
    data, session, _ = run_session(a, WALL)
    evs = events(data)
    records = decode_all(data)
    assert isinstance(records[0], Header) and records[0].fields["start"] == "2026-02-02T09:00:00+01:00"
    assert evs[0].name == "session_start" and evs[-1].name == "session_end"
    verdicts = rederive(evs)
    assert verdicts and all((word == "hit") == inside for word, inside in verdicts)
    outcomes = [e.args[0] for e in evs if e.name == "outcome"]
    c = session.counts
    assert outcomes.count("hit") == c.hits == len([e for e in evs if e.name == "reward"])
    assert outcomes.count("hit") + outcomes.count("miss") == c.trials
    assert (outcomes.count("premature"), outcomes.count("lone"), outcomes.count("omission")) == (
        c.premature, c.lone, c.omissions)
    times = [e.t_us for e in evs]
    assert times == sorted(times)
    lever = [e.name for e in evs if e.name in ("lever_down", "lever_up")]
    assert lever == ["lever_down", "lever_up"] * (len(lever) // 2)  # presses never overlap


def test_inter_trial_press_restarts_the_inter_trial_interval():
    a = animal(params=LearnerParams(iti_press_rate=3.0, iti_press_floor=3.0))
    data, session, _ = run_session(a, WALL)
    evs = events(data)
    iti_us = session.stage.iti_ms * 1000
    between, last_release, checked = False, None, 0
    for e in evs:
        if e.name == "outcome":
            between, last_release = True, None
        elif e.name == "lever_up" and between:
            last_release = e.t_us
        elif e.name == "trial_start":
            if last_release is not None:
                assert e.t_us - last_release >= iti_us  # restarted by the inter-trial press
                checked += 1
            between = False
    assert checked > 20 and session.counts.inter_trial >= checked


def test_double_taps_are_premature_trials():
    a = animal(params=LearnerParams(double_tap_rate=0.3))
    data, session, _ = run_session(a, WALL)
    evs = events(data)
    presses, premature = [], 0
    for e in evs:
        if e.name == "trial_start":
            presses = []
        elif e.name == "lever_down":
            presses.append(e.t_us)
        elif e.name == "outcome" and e.args[0] == "premature":
            assert presses[1] - presses[0] < session.stage.premature_ms * 1000
            premature += 1
    assert premature == session.counts.premature > 10


def test_older_firmware_sends_no_outcome_or_param_but_rewards():
    a = animal(board=BoardConfig(legacy=True))
    data, session, _ = run_session(a, WALL)
    names = {e.name for e in events(data)}
    assert "outcome" not in names and "param" not in names
    assert {"trial_start", "lever_down", "reward", "lick"} <= names
    assert sum(e.name == "reward" for e in events(data)) == session.counts.hits


def test_shaping_advances_stages_and_ramps_target():
    a = animal(seed=3)
    train(a, scenario.session_days(scenario.FIRST_DAY, 14), None)
    stages = [s["stage_number"] for s in a.sessions]
    targets = [s["target_ms"] for s in a.sessions]
    assert stages[0] == 1 and stages[-1] == 3
    assert stages == sorted(stages) and targets == sorted(targets)


def test_adaptive_window_holds_reward_rate():
    protocol = ScenarioProtocol("adaptive", stages=(
        Stage("adaptive", target_ms=400, tolerance=0.4, adaptive_rate=0.5,
              tolerance_min=0.05, tolerance_max=0.6),))
    a = animal(seed=4, protocol=protocol, params=LearnerParams(naive_ms=400))
    data, session, _ = run_session(a, WALL)
    evs = events(data)
    lows = [int(e.args[1]) for e in evs if e.name == "param" and e.args[0] == "window_low_ms"]
    assert len(lows) > 3  # the window was retuned and announced
    outcomes = [e.args[0] for e in evs if e.name == "outcome" and e.args[0] in ("hit", "miss")]
    late = outcomes[len(outcomes) // 2 :]
    assert late.count("hit") / len(late) == pytest.approx(0.5, abs=0.1)
    assert all((w == "hit") == inside for w, inside in rederive(evs))


def test_joystick_hold_samples_at_most_200_hz_and_verdicts_follow_crossings():
    protocol = scenario.joystick_protocol(600)
    a = animal(seed=5, protocol=protocol, board=BoardConfig(fw="holdstick-v1"),
               params=LearnerParams(naive_ms=300))
    data, session, _ = run_session(a, WALL)
    evs = events(data)
    samples = [e for e in evs if e.name == "joystick"]
    assert samples
    gaps = np.diff([e.t_us for e in samples])
    assert gaps.min() >= 5000  # at most 200 Hz
    threshold = protocol.joystick_threshold_deg
    window, crossed, released, checked = {}, None, None, 0
    for e in evs:
        if e.name == "param":
            window[e.args[0]] = e.args[1]
        elif e.name == "trial_start":
            crossed = released = None
        elif e.name == "joystick":
            v = float(e.args[0])
            if crossed is None and v >= threshold:
                crossed = e.t_us
            elif crossed is not None and released is None and v < threshold:
                released = e.t_us
        elif e.name == "outcome" and e.args[0] in ("hit", "miss"):
            hold = released - crossed
            inside = int(window["window_low_ms"]) * 1000 <= hold <= int(window["window_high_ms"]) * 1000
            assert (e.args[0] == "hit") == inside
            checked += 1
    assert checked == session.counts.trials > 50


def test_counter_wraps_soon_after_start_and_unwraps():
    board = BoardConfig(counter_start_us=wrap_soon(30))
    a = animal(board=board)
    data, session, _ = run_session(a, WALL)
    evs = events(data)
    raw = [e.raw_time for e in evs]
    assert raw[0] > 2**32 - 31_000_000 and min(raw) < 1_000_000_000  # it wrapped
    assert [e.t_us for e in evs] == sorted(e.t_us for e in evs)
    assert evs[-1].t_us - evs[0].t_us == session.now > 60e6  # unwrapped span = simulated span


def test_board_reset_starts_a_new_segment_with_restarted_counter():
    board = Board(BoardConfig(wrap=16), datetime(2026, 1, 1, tzinfo=timezone.utc))
    lines = [board.boot(0), board.encode(70_000, "lick", ()), board.boot(80_000),
             board.encode(90_000, "lick", ())]
    records = decode_all(b"".join(lines))
    assert [type(r).__name__ for r in records] == ["Header", "Event", "Header", "Event"]
    assert records[1].raw_time == (1_500_000 + 70_000) % 2**16
    assert records[3].raw_time == (1_500_000 + 10_000) % 2**16 and records[3].segment == 2
    assert records[2].fields["start"] == "2026-01-01T00:00:00+00:00"


def test_session_limits_trials_and_water():
    protocol = scenario.two_press_protocol(650)
    short = ScenarioProtocol(protocol.name, protocol.stages, max_trials=40)
    a = animal(protocol=short)
    _, session, _ = run_session(a, WALL)
    assert session.counts.trials == 40


def test_stuck_lever_times_out_trials():
    a = animal()
    session = Session(a.protocol, 0, a.learner, a.rng)
    session.faults.lever_stuck_until = 120_000_000
    chunks = [session.next_chunk() for _ in range(6)]
    flat = [e for c in chunks for e in c]
    downs = [e for e in flat if e[1] == "lever_down"]
    assert len(downs) == 1 and all(e[2] != ("hit",) for e in flat)
    assert sum(e[2] == ("omission",) for e in flat) == 5
