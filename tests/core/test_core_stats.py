"""Live statistics: incremental snapshots equal a from-scratch batch recomputation (numpy)."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from monitor.core.session.binomial import wilson
from monitor.core.protocol import parse_protocol
from monitor.core.session.summary import figures
from monitor.core.session.live_stats import LiveSession

PROTOCOL = """
[protocol]
name = "stats"
version = 1
task = "two_press"
target_ms = 700
tolerance = 0.2
trial_timeout_ms = 2000
reward_ul = 4

[plateau]
min_hit_rate = 0.5
fixed_window_ms = [600, 800]
"""

WINDOW = 7


def batch(trials, stream_events, valve):
    """From scratch, with numpy, on everything seen: the reference for every live figure."""
    done = [t for t in trials if t.completed]
    intervals = np.array([t.interval_ms for t in done if math.isfinite(t.interval_ms)])
    targets = np.array([t.target_ms for t in done if math.isfinite(t.interval_ms)])
    last = [t.rewarded for t in done][-WINDOW:]
    water = sum(float(e.args[0]) if e.args else 4.0 for e in stream_events if e.name == "reward")
    water += sum(float(e.args[0]) * valve for e in stream_events if e.name == "valve")
    return {
        "trials": len(done),
        "hits": sum(t.rewarded for t in done),
        "rolling": (sum(last), len(last)),
        "median": float(np.median(intervals)) if len(intervals) else math.nan,
        "rolling_median": float(np.median(intervals[-WINDOW:])) if len(intervals) else math.nan,
        "cv": float(np.std(intervals, ddof=1) / np.mean(intervals)) if len(intervals) > 1 else math.nan,
        "fwf": float(np.mean((intervals >= 600) & (intervals <= 800))) if len(intervals) else math.nan,
        "mae": float(np.median(np.abs(np.log(intervals / targets)))) if len(intervals) else math.nan,
        "hist": np.histogram(intervals, bins=60, range=(0.0, 2 * 840.0))[0],  # numpy.histogram as reference
        "water": water,
        "licks": sum(e.name == "lick" for e in stream_events),
        "lone": sum(t.outcome == "lone" for t in trials),
    }


def same(a, b):
    return (math.isnan(a) and math.isnan(b)) or a == pytest.approx(b, rel=1e-9, abs=1e-12)


@st.composite
def sessions(draw):
    items, t = [], 0.0
    for _ in range(draw(st.integers(0, 80))):
        t += draw(st.floats(0.5, 2500))
        kind = draw(st.sampled_from(["press", "press", "press", "lick", "reward", "valve", "outcome"]))
        if kind == "press":
            items.append((t, "lever_down"))
        elif kind == "lick":
            items.append((t, "lick"))
        elif kind == "reward":
            items.append((t, "reward") if draw(st.booleans()) else (t, "reward", draw(st.sampled_from([2, 3.5]))))
        elif kind == "valve":
            items.append((t, "valve", draw(st.sampled_from([40, 55]))))
        else:
            items.append((t, "outcome", draw(st.sampled_from(["hit", "miss", "lone"]))))
    return items


@pytest.mark.slow
@settings(max_examples=120, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(items=sessions())
def test_incremental_equals_from_scratch(events, items):
    protocol = parse_protocol(PROTOCOL, "s.toml")
    evs = events(*items)
    live = LiveSession(protocol, window=WINDOW, valve_ul_per_ms=0.1)
    for i, event in enumerate(evs, start=1):
        live.feed(event)
        if i % 5 and i != len(evs):
            continue
        snap, ref = live.snapshot(), batch(live.trials, evs[:i], 0.1)
        assert (snap.trials, snap.hits, snap.lone) == (ref["trials"], ref["hits"], ref["lone"])
        assert snap.licks == ref["licks"]
        assert (snap.rolling_hits, snap.rolling_trials) == ref["rolling"]
        assert (snap.rolling_low, snap.rolling_high) == wilson(ref["rolling"][0], ref["rolling"][1])
        series = live.stats.rate_series()  # one point per completed trial, the last one the snapshot's
        assert len(series.trial) == snap.trials and not series.rate.flags.writeable
        if snap.trials:
            assert same(series.rate[-1], snap.rolling_hit_rate)
            assert (series.low[-1], series.high[-1]) == (snap.rolling_low, snap.rolling_high)
        for mine, theirs in ((snap.median_interval_ms, ref["median"]), (snap.rolling_median_ms, ref["rolling_median"]),
                             (snap.cv, ref["cv"]), (snap.fixed_window_fraction, ref["fwf"]),
                             (snap.median_abs_log_error, ref["mae"]), (snap.water_ul, ref["water"])):
            assert same(mine, theirs)
        assert np.array_equal(snap.linear.today, ref["hist"])
    live.finish()
    # the session summary (session.summary.figures, numpy batch) agrees with the live figures at the end
    snap, summary = live.snapshot(), figures(live.trials, (600.0, 800.0))
    assert summary.trials == snap.trials and summary.hits == snap.hits
    if summary.median_interval_ms is not None:
        assert summary.median_interval_ms == snap.median_interval_ms
        assert same(summary.fixed_window_fraction, snap.fixed_window_fraction)


def two_stages(events, second_ms: float) -> LiveSession:
    """A 700 ms trial in stage a, then one of `second_ms` in stage b (target 1000 ms, window 800-1200)."""
    protocol = parse_protocol(PROTOCOL + '[[stages]]\nname = "a"\n[[stages]]\nname = "b"\ntarget_ms = 1000\n', "s.toml")
    live = LiveSession(protocol, window=WINDOW)
    for e in events((0, "lever_down"), (700, "lever_down"), (5000, "param", "stage", "b"),
                    (6000, "lever_down"), (6000 + second_ms, "lever_down"), (9000, "lick")):
        live.feed(e)
    return live


def test_stage_change_restarts_interval_figures_but_not_totals(events):
    snap = two_stages(events, 1000).snapshot()
    assert snap.stage == "b" and snap.trials == 2 and len(snap.recent_intervals_ms) == 1
    assert snap.median_interval_ms == 1000.0 and snap.target_ms == 1000.0
    assert snap.recent_intervals_ms.tolist() == [1000.0] and not snap.recent_intervals_ms.flags.writeable


def test_the_rolling_hit_rate_series_restarts_with_the_stage(events):
    series = two_stages(events, 1500).stats.rate_series()
    # a hit in stage a, then a miss in b (1500 ms, outside 800-1200): b's rate is its one miss alone, not 1/2
    assert series.trial.tolist() == [1.0, 2.0] and series.rate.tolist() == [1.0, 0.0]
    assert (series.low[-1], series.high[-1]) == wilson(0, 1)
