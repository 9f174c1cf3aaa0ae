"""Verdicts over a sequence of per-session figures: windows open and close where the rule says.

The expected sessions below are derived by hand from the rule text and the
figures in the table (the outside check is that derivation, written out in
the comments), not from the code under test.
"""

from __future__ import annotations

import pytest

from drivers.config import TomlFile
from monitor.core.eligibility.rules import parse_eligibility
from monitor.core.eligibility.figures import AnimalFigures, SessionForecast
from monitor.core.eligibility.verdict import (IN_WINDOW, REVIEW, TRAINING, WAITING, WINDOW_PASSED, evaluate,
                                              window_changes)

RULE_TEXT = """\
[eligibility]
warn_sessions = 2

[eligibility.groups.early]
label = "plateaued, not consolidated"
max_sessions_since_plateau = 6
max_interval_error = 0.2
max_slow_fraction = 0.5

[eligibility.groups.late]
label = "consolidated"
min_sessions_since_plateau = 8
max_sessions_since_plateau = 12
max_cv = 0.25
min_slow_fraction = 0.8
slow_fraction_basis = "estimate"
"""
PLATEAU_SESSION = 8  # the plateau is recognised at session 10 (a 3-session run starting at 8)
# slow-state fraction estimate by sessions since plateau (interval = estimate +- 0.05)
SLOW = {2: .30, 3: .36, 4: .42, 5: .50, 6: .58, 7: .66, 8: .74, 9: .82, 10: .90, 11: .92, 12: .94, 13: .95}


def rule(text: str = RULE_TEXT):
    doc = TomlFile(text, "cohort.toml")
    return parse_eligibility(doc.data["eligibility"], doc, protocol_name="two-press 650 ms", protocol_version=3)


def figures(session: int, **changes) -> AnimalFigures:
    values = dict(animal="heron", protocol_name="two-press 650 ms", protocol_version=3, session=session,
                  measures={"interval_error": 0.12, "cv": 0.18})
    if session >= 10:
        since = session - PLATEAU_SESSION
        estimate = SLOW[since]
        values.update(plateau_reached=True, plateau_session=PLATEAU_SESSION, sessions_since_plateau=since,
                      trials_since_plateau=since * 300, slow_estimate=estimate,
                      slow_low=round(estimate - 0.05, 2), slow_high=round(estimate + 0.05, 2),
                      slow_status="estimated")
    values.update(changes)
    return AnimalFigures(**values)


def test_animal_enters_and_leaves_the_windows_at_the_sessions_the_rule_implies():
    verdicts = {s: evaluate(rule(), figures(s)) for s in range(1, 22)}
    # By hand: sessions 1-9 no plateau known -> training.
    # early: since <= 6, error 0.12 <= 0.2, whole interval <= 0.5: high = .35 .41 .47 at sessions 10-12,
    #   .55 at 13 (> 0.5, but low .45 is not above 0.5: not yet), low .53 at 14 (> 0.5: passed).
    # late: since 8..12 (sessions 16-20), cv 0.18 <= 0.25, estimate >= 0.8: .74 at 16 (no), .82 at 17 (yes);
    #   session 21: since 13 > 12 -> passed; early passed too -> window passed.
    expected = {**{s: (TRAINING, ()) for s in range(1, 10)},
                **{s: (IN_WINDOW, ("early",)) for s in (10, 11, 12)},
                **{s: (WAITING, ()) for s in (13, 14, 15, 16)},
                **{s: (IN_WINDOW, ("late",)) for s in (17, 18, 19, 20)},
                21: (WINDOW_PASSED, ())}
    assert {s: (v.kind, v.open_groups) for s, v in verdicts.items()} == expected
    assert verdicts[10].state == "in window: plateaued, not consolidated"
    assert verdicts[17].state == "in window: consolidated"
    assert verdicts[13].status("early").state == "not yet"
    assert verdicts[14].status("early").state == "passed"
    assert verdicts[16].status("late").state == "not yet"
    assert verdicts[21].state == "window passed"
    for verdict in verdicts.values():  # one sentence with a reason
        assert verdict.reason.endswith(".") and verdict.reason.count(". ") == 0


def test_reasons_name_the_figures():
    assert evaluate(rule(), figures(5)).reason == "Plateau not reached in the final stage yet (session 5)."
    reason = evaluate(rule(), figures(10)).reason
    assert "plateaued, not consolidated" in reason and "sessions since plateau 2 (needs ≤ 6)" in reason
    assert "slow-state fraction 0.30 (0.25–0.35, estimated; needs ≤ 0.5)" in reason
    waiting = evaluate(rule(), figures(16)).reason
    assert waiting.startswith('Plateau at session 8; the window for "consolidated" is not open yet')
    assert "slow-state fraction 0.74" in waiting


def test_a_fraction_the_data_do_not_constrain_is_read_as_its_interval_only():
    # a rule may accept "not constrained" (slow_fraction_status); its words then give no point value
    text = RULE_TEXT.replace('max_slow_fraction = 0.5\n', 'max_slow_fraction = 0.5\n'
                             'slow_fraction_status = ["estimated", "not constrained"]\n')
    early = evaluate(rule(text), figures(10, slow_estimate=0.85, slow_low=0.01, slow_high=1.0,
                                         slow_status="not constrained")).status("early")
    words = " ".join(early.met + early.unmet)
    assert "slow-state fraction: no point value (0.01–1.00, not constrained; needs ≤ 0.5)" in words
    assert "0.85" not in words


def test_the_model_figure_never_opens_a_window_without_its_transparent_measure():
    bad_cv = evaluate(rule(), figures(18, measures={"interval_error": 0.12, "cv": 0.4}))
    assert bad_cv.kind == WAITING and not bad_cv.open_groups
    assert "CV 0.4 (needs ≤ 0.25)" in bad_cv.reason


def test_missing_measure_or_unaccepted_status_needs_review():
    no_cv = evaluate(rule(), figures(18, measures={"interval_error": 0.12}))
    assert no_cv.kind == REVIEW and "CV not available" in no_cv.reason
    weak = evaluate(rule(), figures(18, slow_status="not constrained"))
    assert weak.kind == REVIEW and weak.state == "needs review"
    assert "status is 'not constrained' (accepted: estimated" in weak.reason
    other_version = evaluate(rule(), figures(18, protocol_version=2))
    assert other_version.kind == REVIEW and "protocol version 2" in other_version.reason
    other_protocol = evaluate(rule(), figures(18, protocol_name="joystick hold"))
    assert other_protocol.kind == REVIEW and "'joystick hold'" in other_protocol.reason


def test_inconsistent_interval_is_not_used():
    odd = figures(11, slow_low=0.6, slow_high=0.2)  # low above the estimate and the high end
    assert odd.slow_estimate is None and odd.slow_low is None
    assert evaluate(rule(), odd).kind == REVIEW


def test_closing_range_combines_count_and_model_forecast():
    exact = evaluate(rule(), figures(10)).status("early")
    assert exact.closes_in == (5, 5)  # since 2, max 6: sessions 11..14 inside, the 5th next is outside
    forecast = figures(10, forecast={"early": SessionForecast(closes_in=(2, 4))})
    combined = evaluate(rule(), forecast).status("early")
    assert combined.closes_in == (2, 4)  # the window closes at whichever condition fails first
    later = figures(10, forecast={"early": {"closes_in": (6, 9)}})
    assert evaluate(rule(), later).status("early").closes_in == (5, 5)


def test_opening_range_from_counts_and_model():
    # session 13: early not yet; late needs since >= 8 (now 5: 3 sessions) and the model (no forecast)
    assert evaluate(rule(), figures(13)).status("late").opens_in is None
    hinted = figures(13, forecast={"late": SessionForecast(opens_in=(2, 5))})
    assert evaluate(rule(), hinted).status("late").opens_in == (3, 5)  # both must hold: latest of each end


def test_trial_counts_forecast_from_trials_per_session():
    text = "[eligibility.groups.g]\nmax_trials_since_plateau = 1000\nmax_cv = 0.3\n"
    f = figures(10, trials_since_plateau=400, trials_per_session=(150, 300))
    # 601 more trials end the window: ceil(601/300) = 3 to ceil(601/150) = 5 sessions
    assert evaluate(rule(text), f).status("g").closes_in == (3, 5)


def test_alerts_are_what_changed():
    r = rule()
    previous = None
    seen = {}
    for session in range(9, 22):
        current = evaluate(r, figures(session, forecast={"early": SessionForecast(closes_in=(2, 4))}
                                      if session == 10 else {}))
        seen[session] = [(a.group, a.kind, a.sessions) for a in window_changes(previous, current, r.warn_sessions)]
        previous = current
    assert seen[10] == [("early", "opened", (2, 4))]
    assert seen[11] == []  # closes_in (4,4) by count: lower end 4 > warn_sessions 2
    assert seen[12] == []  # (3,3): still above warn_sessions
    assert seen[13] == [("early", "closed", None)]
    assert ("late", "opened", (4, 4)) in seen[17]
    assert ("late", "closing", (2, 2)) in seen[19]
    assert seen[20] == [("late", "closing", (1, 1))]
    assert seen[21] == [("late", "closed", None)]
    assert all(not alerts for s, alerts in seen.items() if s in (9, 14, 15))


def test_a_verdict_needing_review_opens_no_window():
    wrong_version = evaluate(rule(), figures(12, protocol_version=2))
    assert wrong_version.status("early").state == "open" and not wrong_version.open_groups
    assert window_changes(None, wrong_version, 2) == ()
    closed = window_changes(evaluate(rule(), figures(12)), wrong_version, 2)
    assert [a.kind for a in closed] == ["closed"] and "protocol version 2" in closed[0].message


def test_first_evaluation_reports_open_windows():
    alerts = window_changes(None, evaluate(rule(), figures(12)), 2)
    assert [a.kind for a in alerts] == ["opened"]
    assert alerts[0].message.startswith("heron: window for plateaued, not consolidated opened")


@pytest.mark.parametrize("session", [10, 17, 21])
def test_verdict_is_a_pure_function(session):
    assert evaluate(rule(), figures(session)) == evaluate(rule(), figures(session))
