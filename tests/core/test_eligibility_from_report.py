"""Figures read from a per-animal report (the shape of animal_report) feed the rule as documented."""

from __future__ import annotations

import pytest

from monitor.core.eligibility.rules import parse_eligibility
from monitor.core.eligibility.figures import SessionForecast
from monitor.core.eligibility.from_report import figures_from_report
from monitor.core.eligibility.verdict import IN_WINDOW, NOT_YET, REVIEW, WAITING, evaluate
from monitor.core.session.animal_report import SessionData, animal_report
from monitor.core.session.trials import Trial

RULE = parse_eligibility({"groups": {"early": {"max_sessions_since_plateau": 6, "max_interval_error": 0.2,
                                               "max_slow_fraction": 0.5}}})


def report(count: int, plateau: int | None, excluded=()):
    rows = [{"index": i, "trials": 200 + 10 * i, "hit_rate": 0.5, "cv": 0.2, "fixed_window_fraction": 0.6,
             "median_abs_log_error": 0.1 + i / 1000, "protocol_version": 3, "excluded": i in excluded}
            for i in range(1, count + 1)]
    return {"animal": "heron", "protocol": "two-press 650 ms", "protocol_version": 3, "sessions": rows,
            "plateau": {"reached": plateau is not None, "session": plateau, "rule": "consecutive_sessions"}}


def test_counts_and_measures_from_the_latest_included_session():
    f = figures_from_report(report(12, 8, excluded={10}))
    # sessions after 8 that count: 9, 11, 12 -> 3; their trials 290 + 310 + 320 (hand sum)
    assert (f.session, f.plateau_session, f.sessions_since_plateau, f.trials_since_plateau) == (12, 8, 3, 920)
    assert f.measures["interval_error"] == 0.112 and f.measures["cv"] == 0.2
    assert f.trials_per_session == (270, 320)  # last 5 included: sessions 7, 8, 9, 11, 12
    assert f.protocol_name == "two-press 650 ms" and f.protocol_version == 3


def test_no_plateau_means_no_counts():
    f = figures_from_report(report(5, None))
    assert not f.plateau_reached and f.sessions_since_plateau is None and f.trials_since_plateau is None


def test_consolidation_from_the_latest_session_is_used_and_a_stale_one_is_marked():
    fresh = figures_from_report(report(12, 8), {"session": 12, "estimate": 0.4, "low": 0.3, "high": 0.5,
                                                "status": "estimated"})
    assert (fresh.slow_estimate, fresh.slow_low, fresh.slow_high, fresh.slow_status) == (0.4, 0.3, 0.5, "estimated")
    stale = figures_from_report(report(12, 8), {"session": 11, "estimate": 0.4, "low": 0.3, "high": 0.5,
                                                "status": "estimated"})
    assert stale.slow_status == "stale (session 11)"
    assert evaluate(RULE, fresh).kind == IN_WINDOW
    assert evaluate(RULE, stale).kind == REVIEW  # an old fit never opens a window


def test_start_drop_and_forecasts_pass_through():
    rows = report(9, 8)
    rows["sessions"][-1]["start_drop"] = 0.05
    f = figures_from_report(rows, forecast={"early": SessionForecast(closes_in=(1, 3))})
    assert f.measures["start_drop"] == 0.05 and f.forecast["early"].closes_in == (1, 3)


def _trial(index: int, interval_ms: float) -> Trial:
    word = "hit" if 560 <= interval_ms <= 840 else "miss"
    return Trial(index, index * 2_000_000, interval_ms, 700.0, 560.0, 840.0, "main", word, word == "hit",
                 "computed", word, 0)


def test_a_rule_bounding_the_start_drop_gives_a_verdict(basic):
    # session 1 ends 20/20 inside the fixed window (560-840 ms); session 2: 5 warm-up trials, then 10/20 inside
    first = [_trial(i, 700.0) for i in range(1, 31)]
    second = [_trial(i, 400.0) for i in range(1, 6)] + [_trial(5 + i, 700.0 if i % 2 else 1000.0) for i in range(1, 21)]
    entry = animal_report("heron", basic, [SessionData(trials=first), SessionData(trials=second)])
    assert entry["sessions"][0]["start_drop"] is None
    assert entry["sessions"][1]["start_drop"] == pytest.approx(1.0 - 10 / 20)  # hand count
    figures = figures_from_report(entry)
    assert figures.measures["start_drop"] == pytest.approx(0.5)
    lenient = parse_eligibility({"groups": {"g": {"plateau": False, "max_start_drop": 0.6}}})
    strict = parse_eligibility({"groups": {"g": {"plateau": False, "max_start_drop": 0.2}}})
    assert evaluate(lenient, figures).kind == IN_WINDOW
    judged = evaluate(strict, figures)
    assert [g.state for g in judged.groups] == [NOT_YET]  # judged on the figure, not "unknown"
    assert judged.kind == WAITING
