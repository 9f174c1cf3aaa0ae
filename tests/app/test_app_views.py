"""monitor.app.live.views: snapshots, source states and history mapped to the UI's view models, without Qt."""

from __future__ import annotations

import sys

import numpy as np
import pytest
from statsmodels.stats.proportion import proportion_confint

from drivers.status import CONNECTED, LOST, READING, SILENT, STOPPED, WAITING, SourceStatus
from drivers.wire import Event, WireDecoder
from monitor.app.live import views
from monitor.app.live.engine import Engine, SessionPlan
from monitor.core.eligibility.figures import AnimalFigures
from monitor.core.protocol import parse_protocol
from monitor.core.session.trials import build_trials
from monitor.ui.models import Connection, Severity, StoreHealth
from fixtures.protocols import two_press
from fixtures.sessions import session_bytes

PROTOCOL = two_press(plateau_sessions=3, min_trials=5)


def status(state, silent_s=0.0, gap_since=None):
    return SourceStatus(state, 0, 0, 0, silent_s, gap_since, 0, None, "boom" if state == LOST else None, None)


@pytest.mark.parametrize("state, silent, in_session, word", [
    (LOST, 0.0, True, Connection.LOST),
    (WAITING, None, True, Connection.RETRYING),
    (READING, 1.0, True, Connection.LIVE),
    (SILENT, 61.0, True, Connection.QUIET),
    (SILENT, 61.0, False, Connection.IDLE),
    (CONNECTED, 0.0, False, Connection.IDLE),
    (STOPPED, None, True, Connection.IDLE),
])
def test_connection_words(state, silent, in_session, word):
    assert views.connection(status(state, silent), in_session, quiet_after_s=60) is word


def snapshot(intervals):
    engine = Engine(publish_s=0.0, check_s=1e9)
    engine.open_session(SessionPlan("box 1", 5, "wren", PROTOCOL, started=10.0,
                                    previous_intervals={"main": (600.0, 640.0, 700.0)}))
    engine.step(0)
    from monitor.app.live.pipeline import EngineBatch
    from drivers.status import Batch
    data = session_bytes(intervals)
    engine.queue.put(EngineBatch(1, 5, Batch(WireDecoder().feed(data), 0.0), 1.0))
    engine.step(0)
    return engine.take_snapshots()["box 1"], data


def test_tile_state_from_a_snapshot():
    snap, data = snapshot([650, 660, 900, 400, 640])
    tile = views.tile_state("box 1", snap, status(READING), now=70.0, source_text="/dev/ttyACM0",
                            alert_count=2, alert_severity=Severity.URGENT)
    trials, _ = build_trials(PROTOCOL, [r for r in WireDecoder().feed(data) if isinstance(r, Event)])
    hits = sum(t.rewarded for t in trials)
    low, high = proportion_confint(hits, 5, alpha=0.05, method="wilson")   # statsmodels
    assert (tile.animal, tile.connection, tile.session_seconds, tile.trials_today) == \
        ("wren", Connection.LIVE, 60.0, 5)
    assert tile.hit_rate == pytest.approx(hits / 5) and (tile.hit_low, tile.hit_high) == \
        (pytest.approx(low), pytest.approx(high))
    assert tile.last_interval_ms == pytest.approx(640, abs=0.5)
    assert len(tile.hist_edges_ms) == len(tile.hist_counts) + 1 and sum(tile.hist_counts) == 5
    assert (tile.window_low_ms, tile.window_high_ms) == (pytest.approx(520), pytest.approx(780))
    assert (tile.alert_count, tile.alert_severity, tile.source_text) == (2, Severity.URGENT, "/dev/ttyACM0")
    # the same inputs give an equal state (so RigBoard.update reports "unchanged")
    assert tile == views.tile_state("box 1", snap, status(READING), now=70.0, source_text="/dev/ttyACM0",
                                    alert_count=2, alert_severity=Severity.URGENT)


def test_tile_without_a_session_shows_dashes_not_zeros():
    tile = views.tile_state("box 3", None, status(CONNECTED), now=0.0)
    assert (tile.animal, tile.hit_rate, tile.last_interval_ms, tile.session_seconds, tile.connection) == \
        (None, None, None, None, Connection.IDLE)


def test_today_state_carries_the_series_and_previous_session():
    snap, _ = snapshot([650, 660, 900, 400, 640])
    today = views.today_state(snap)
    assert today.trials == 5 and len(today.trial_index) == 5 and today.target_ms == pytest.approx(650)
    assert today.linear.previous is not None and today.linear.previous.sum() == 3
    assert today.rolling_rate is snap.series.rate


def test_status_bar_words():
    bar = views.status_state({"a": status(READING), "b": status(WAITING, gap_since=1.0)}, "ok", "ok", 1234)
    assert bar.sources_text == "1 of 2 sources reading; 1 retrying" and bar.sources_trouble
    assert bar.sources_detail.startswith("b: waiting for device")
    assert (bar.store, bar.store_text) == (StoreHealth.SAVING, "1234 events saved")
    assert views.status_state({}, "failed", "STORE WRITER FAILED: disk", 0).store is StoreHealth.FAILED
    assert views.status_state({}, "overflow", "x", 0).store.loud


def history(hit_patterns):
    """Sessions whose trials hit or miss as given (650 ms hits, 1000 ms misses)."""
    out = []
    for k, pattern in enumerate(hit_patterns):
        data = session_bytes([650.0 if h else 1000.0 for h in pattern])
        trials, builder = build_trials(PROTOCOL, [r for r in WireDecoder().feed(data) if isinstance(r, Event)])
        out.append(views.HistorySession(tuple(trials), start=f"2026-03-0{k + 1} 09:00", rig="box 1",
                                        counts=dict(builder.counts)))
    return out


def test_history_curve_plateau_and_rows():
    # hit rates 0.2, 0.6, 0.5, 0.7: by the protocol's rule (3 sessions >= 0.5) the plateau session is 2
    sessions = history([[1, 0, 0, 0, 0], [1, 1, 1, 0, 0], [1, 0, 1, 0, 1, 0], [1, 1, 1, 1, 1, 0, 0, 0, 0, 1]])
    parts = views.history_parts(PROTOCOL, sessions)
    curve = parts.curve
    assert list(curve.session) == [1, 2, 3, 4]
    assert list(curve.measure) == pytest.approx([0.2, 0.6, 0.5, 0.6])
    low, high = proportion_confint(3, 5, alpha=0.05, method="wilson")       # statsmodels
    assert (curve.low[1], curve.high[1]) == (pytest.approx(low), pytest.approx(high))
    assert (curve.plateau_word, curve.plateau_session, curve.criterion) == ("reached", 2, 0.5)
    assert curve.plateau_reason
    assert [r.trials for r in parts.sessions] == [5, 5, 6, 10]
    assert parts.sessions[0].start == "2026-03-01 09:00" and parts.sessions[0].rig == "box 1"
    assert parts.consolidation.sessions_since_plateau == 2
    assert parts.consolidation.trials_since_plateau == 16
    latest = np.array([650.0] * 6 + [1000.0] * 4)
    assert parts.consolidation.interval_error == pytest.approx(np.median(np.abs(np.log(latest / 650.0))))  # numpy
    assert parts.consolidation.cv == pytest.approx(np.std(latest, ddof=1) / np.mean(latest))              # numpy
    assert parts.previous_intervals["main"] == tuple([650.0] * 5 + [1000.0] * 4 + [650.0])
    assert "not fitted" in parts.consolidation.model_comparison


def test_history_leaves_out_excluded_sessions():
    sessions = history([[1, 1, 1, 1, 1]] * 3)
    sessions[1] = sessions[1]._replace(excluded=True, exclusion_reason="cable fault")
    parts = views.history_parts(PROTOCOL, sessions)
    assert list(parts.curve.session) == [1, 3]
    assert parts.sessions[1].excluded and parts.sessions[1].exclusion_reason == "cable fault"
    assert not parts.plateau_reached


@pytest.mark.slow
def test_views_load_no_qt():
    import subprocess

    code = "import sys, monitor.app.live.views; print(any(m.startswith('PySide6') for m in sys.modules))"
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "False"


def test_start_of_session_drop_and_its_interval():
    from statsmodels.stats.proportion import confint_proportions_2indep

    # previous session ends 16/20 hits; this one starts with 5 warm-up trials, then 9/20
    sessions = history([[1] * 4 + [1] * 16 + [0] * 4, [0] * 5 + [1] * 9 + [0] * 11])
    before = [t.rewarded for t in sessions[0].trials if t.completed][-20:]
    drop = views.history_parts(PROTOCOL, sessions).consolidation.start_drops[0]   # the page's drop (core/session/start_drop.py)
    assert drop.session == 2 and drop.warmup_trials == 5
    assert drop.drop == pytest.approx(sum(before) / 20 - 9 / 20)
    low, high = confint_proportions_2indep(sum(before), 20, 9, 20, method="newcomb", compare="diff")  # statsmodels
    assert (drop.low, drop.high) == (pytest.approx(low), pytest.approx(high))


STAGED = parse_protocol("""
[protocol]
name = "two-press 650 ms, shaped"
version = 1
task = "two_press"
target_ms = 650
tolerance = 0.2

[[stages]]
name = "wide"
tolerance = 0.5

[[stages]]
name = "final"

[plateau]
rule = "consecutive_sessions"
min_hit_rate = 0.5
sessions = 2
min_trials = 5
""")


def staged_history(plan):
    """Sessions of (stage, intervals): the trial builder is given the stage in force."""
    out = []
    for k, (stage, intervals) in enumerate(plan):
        data = session_bytes(intervals, rig_outcomes=False)
        trials, builder = build_trials(STAGED, [r for r in WireDecoder().feed(data) if isinstance(r, Event)], stage)
        out.append(views.HistorySession(tuple(trials), start=f"2026-03-0{k + 1} 09:00", rig="box 1",
                                        counts=dict(builder.counts)))
    return out


def test_learning_curve_shows_every_stage_and_judges_the_final_one():
    # two shaping sessions (one with only 3 trials), then three final-stage sessions
    sessions = staged_history([("wide", [650, 900, 1000, 300, 640]), ("wide", [650, 700, 900]),
                               ("final", [650, 640, 900, 660, 1000]), ("final", [650, 640, 660, 700, 1000]),
                               ("final", [650, 640, 660, 900, 1000])])
    curve = views.history_parts(STAGED, sessions).curve
    assert curve.stage == ("wide", "wide", "final", "final", "final")
    assert list(curve.session) == [1, 2, 3, 4, 5]
    # the shaping stage's window is 650 ± 50 %: 325-975 ms (hand count from the protocol)
    assert list(curve.measure[:2]) == pytest.approx([3 / 5, 3 / 3])
    assert curve.trials == (5, 3, 5, 5, 5)
    assert curve.final_stage == "final"
    # judged in the final stage only: sessions 3 (3/5) and 4 (4/5) both reach 0.5
    assert (curve.plateau_word, curve.plateau_session) == ("reached", 3)


def test_learning_curve_of_a_shaping_animal_is_not_empty():
    sessions = staged_history([("wide", [650, 900, 1000, 300, 640])])
    curve = views.history_parts(STAGED, sessions).curve
    assert list(curve.session) == [1] and curve.stage == ("wide",)
    assert curve.plateau_word == "not reached"


def test_a_box_streaming_with_nobody_checked_in_has_its_own_tile_state():
    engine = Engine(publish_s=0.0, check_s=1e9)
    from monitor.app.live.pipeline import EngineBatch
    from drivers.status import Batch
    engine.add_rig("box 2", 1)
    engine.step(0)
    engine.queue.put(EngineBatch(1, 99, Batch(WireDecoder().feed(session_bytes([650, 700])), 0.0), 1.0))
    engine.step(0)
    snap = engine.take_snapshots()["box 2"]
    tile = views.tile_state("box 2", snap, status(READING), now=5.0)
    assert tile.connection is Connection.UNATTENDED and tile.unattended_presses == 6
    assert tile.animal is None and tile.trials_today == 0
    from monitor.ui.tile import tile_texts
    texts = tile_texts(tile)
    assert (texts.state, texts.trials, texts.trials_caption) == ("unattended", "6", "presses kept")
    assert views.tile_state("box 2", None, status(READING), now=5.0).connection is Connection.IDLE


def test_the_page_and_the_eligibility_figures_share_one_definition_each():
    # the consolidation panel's transparent measures are the eligibility's figures from the report's sessions
    from monitor.core.eligibility.from_report import figures_from_report

    sessions = history([[1, 0, 0, 0, 0], [1, 1, 1, 0, 0], [1, 0, 1, 0, 1, 0], [1, 1, 1, 1, 1, 0, 0, 0, 0, 1],
                        [1, 1, 1, 1, 0]])
    parts = views.history_parts(PROTOCOL, sessions)
    assert parts.consolidation.sessions_since_plateau == 3      # sessions 3, 4 and 5 come after the plateau (2)
    assert parts.consolidation.trials_since_plateau == 6 + 10 + 5
    report_sessions = [{"index": k + 1, "trials": r.trials, "excluded": False, "cv": r.cv,
                        "median_abs_log_error": None} for k, r in enumerate(parts.sessions)]
    figures = figures_from_report({"animal": "wren", "sessions": report_sessions,
                                   "plateau": {"reached": True, "session": parts.plateau_session}})
    assert figures.sessions_since_plateau == parts.consolidation.sessions_since_plateau
    assert figures.trials_since_plateau == parts.consolidation.trials_since_plateau
    assert figures.measures["cv"] == parts.consolidation.cv


def test_consolidation_panel_states_a_point_only_when_estimated_and_no_passed_level():
    rows = [{"session": 1, "estimate": 0.5, "low": 0.3, "high": 0.7, "status": "estimated"},
            {"session": 2, "estimate": 0.85, "low": 0.0, "high": 1.0, "status": "not constrained"}]
    fit = {"status": "not constrained", "reason": "AIC", "trajectory": rows,
           "forecast": {"level": 0.8, "reached": False, "summary": "0.80 in 2–5 more sessions (model range)",
                        "sessions_low": 2, "sessions_high": 5}}
    figures = AnimalFigures("wren", "p", 1, sessions_since_plateau=2, trials_since_plateau=10)
    state = views._consolidation_state(figures, (), fit)
    assert "0.85" not in state.estimate_text and "no point value" in state.estimate_text
    assert state.forecast_text == "" and state.forecast_low is None  # no forecast from an unsupported fit
    done = views._consolidation_state(figures, (), fit | {
        "status": "estimated", "trajectory": [rows[0], rows[1] | {"status": "estimated", "low": 0.8, "high": 0.9}],
        "forecast": fit["forecast"] | {"reached": True, "sessions_low": None, "sessions_high": None}})
    assert done.estimate_text == "0.85 (90 % interval 0.80–0.90), estimated"
    assert done.forecast_text == "already above 0.80"
