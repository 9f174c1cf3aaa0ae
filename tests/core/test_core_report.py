"""The per-animal report and per-session summaries, from events to JSON."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest

from monitor.core.protocol import parse_protocol
from monitor.core.session.animal_report import SessionData, animal_report
from monitor.core.session.summary import SessionInput, summarize
from monitor.core.session.trials import build_trials

PROTOCOL = """
[protocol]
name = "two-press 700 ms"
version = 3
task = "two_press"
target_ms = 700
tolerance = 0.2
trial_timeout_ms = 3000
reward_ul = 5

[[stages]]
name = "shaping"
tolerance = 0.5

[[stages]]
name = "final"

[plateau]
rule = "consecutive_sessions"
min_hit_rate = 0.5
sessions = 2
min_trials = 10
"""


def session_items(intervals, stage="final", framed=False, start_ms=0.0):
    """A session of our own: one trial every 4 s; a 5 µL reward after each hit (as a rig would)."""
    items = [(start_ms, "param", "stage", stage)]
    t = start_ms + 1000
    for interval in intervals:
        if framed:
            items.append((t - 10, "trial_start"))
        items += [(t, "lever_down"), (t + 80, "lever_up"),
                  (t + interval, "lever_down"), (t + interval + 80, "lever_up")]
        hit = 560 <= interval <= 840 if stage == "final" else 350 <= interval <= 1050
        if framed:
            items.append((t + interval + 81, "outcome", "hit" if hit else "miss"))
        if hit:
            items += [(t + interval + 200, "reward"), (t + interval + 400, "lick")]
        t += 4000
    return items


def rates_to_intervals(hits, misses):
    return [700.0] * hits + [1500.0] * misses


def test_report_from_events(events):
    protocol = parse_protocol(PROTOCOL, "p.toml")
    data = [
        SessionData(events=events(*session_items(rates_to_intervals(8, 12), stage="shaping")),
                    start="2026-03-02T09:14:03+01:00", malformed_lines=2),
        SessionData(events=events(*session_items(rates_to_intervals(4, 16), framed=True)), start="s2"),
        SessionData(events=events(*session_items(rates_to_intervals(10, 10))), start="s3"),  # 0.5 exactly
        SessionData(events=events(*session_items(rates_to_intervals(0, 20))), start="s4", excluded=True,
                    exclusion_reason="lesion"),
        SessionData(events=events(*session_items(rates_to_intervals(15, 5), framed=True)), start="s5"),
    ]
    report = animal_report("heron", protocol, data)
    json.dumps(report)  # plain JSON types only
    assert report["animal"] == "heron" and report["protocol"] == "two-press 700 ms"
    rows = report["sessions"]
    assert [r["index"] for r in rows] == [1, 2, 3, 4, 5]
    first = rows[0]
    # the report JSON in docs/cli.md keys
    assert {"index", "start", "trials", "hits", "hit_rate", "median_interval_ms", "cv", "malformed_lines"} <= set(first)
    assert (first["trials"], first["hits"], first["hit_rate"], first["malformed_lines"]) == (20, 8, 0.4, 2)
    assert first["stage"] == "shaping" and first["start"] == "2026-03-02T09:14:03+01:00"
    assert first["water_ul"] == 40.0 and first["protocol_version"] == 3
    values = np.array(rates_to_intervals(8, 12))
    assert first["median_interval_ms"] == float(np.median(values))
    assert first["cv"] == pytest.approx(float(np.std(values, ddof=1) / np.mean(values)))  # numpy as reference
    assert rows[1]["disagreements"] == 0 and rows[3]["excluded"]
    plateau = report["plateau"]
    assert plateau["rule"] == "consecutive_sessions" and plateau["stage"] == "final"
    # session 1 is another stage, 4 is excluded: 3 (0.5 exactly) and 5 (0.75) make the run
    assert plateau["reached"] is True and plateau["session"] == 3
    assert plateau["sessions_judged"] == [2, 3, 5]
    assert {d["session"] for d in plateau["left_out"]} == {1, 4}
    assert "consolidation" not in report
    assert set(plateau["other_rules"]) >= {"slope", "asymptote_fraction", "change_point"}
    assert isinstance(plateau["above_chance"]["reason"], str)


def test_events_and_trials_give_the_same_session_figures(events):
    protocol = parse_protocol(PROTOCOL, "p.toml")
    evs = events(*session_items(rates_to_intervals(6, 14)))
    trials, builder = build_trials(protocol, evs)
    by_events = animal_report("a", protocol, [SessionData(events=evs)])["sessions"][0]
    by_trials = animal_report("a", protocol, [SessionData(trials=trials)])["sessions"][0]
    for key in ("trials", "hits", "hit_rate", "median_interval_ms", "cv", "fixed_window_fraction", "lone"):
        assert by_events[key] == by_trials[key]
    summary = summarize(protocol, SessionInput(trials, counts=builder.counts), 1)
    assert summary.figures.hit_rate == 0.3 and summary.stages == ("final",)


def test_empty_session_has_no_figures_not_errors():
    protocol = parse_protocol(PROTOCOL, "p.toml")
    row = animal_report("a", protocol, [SessionData(events=[])])["sessions"][0]
    assert row["trials"] == 0 and row["hit_rate"] is None and row["median_interval_ms"] is None
    report = animal_report("a", protocol, [])
    assert report["sessions"] == [] and report["plateau"]["reached"] is False and report["plateau"]["session"] is None


def test_median_abs_log_error_uses_the_target_in_force(events):
    protocol = parse_protocol(PROTOCOL, "p.toml")
    intervals = [700.0, 770.0, 630.0, 1400.0]
    trials, _ = build_trials(protocol, events(*session_items(intervals)))
    row = animal_report("a", protocol, [SessionData(trials=trials)])["sessions"][0]
    assert row["median_abs_log_error"] == pytest.approx(float(np.median(np.abs(np.log(np.array(intervals) / 700)))))
    assert not math.isnan(row["fixed_window_fraction"]) and row["fixed_window_fraction"] == 0.75


def test_protocol_without_a_plateau_table_still_reports(events):
    protocol = parse_protocol(PROTOCOL.split("[plateau]")[0], "p.toml")
    report = animal_report("a", protocol, [SessionData(events=events(*session_items(rates_to_intervals(9, 1))))])
    plateau = report["plateau"]
    assert plateau["reached"] is False and plateau["rule"] == "consecutive_sessions"
    assert "no threshold" in plateau["reason"]
