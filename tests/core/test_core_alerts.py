"""monitor.core.alerts: each rule fires once when its condition starts, re-arms when it clears."""

from __future__ import annotations

from monitor.core.alerts import (ATTENTION, INFO, LINK_DOWN, LINK_ENDED, LINK_UP, URGENT, AlertRules, RigWatch,
                                 plateau_alert, store_alert)

RULES = AlertRules(silent_minutes=1, lever_held_s=5, valve_max_ms=200, gone_after_s=30, malformed_burst=3,
                   malformed_window_s=10, repeat_s=20)


def kinds(raised):
    return [(r.kind, r.severity) for r in raised]


def test_silence_only_during_a_session_and_once_until_data_returns():
    watch = RigWatch(RULES)
    assert watch.tick(1000.0) == []                      # no session: silence is fine
    watch.session(True, 0.0)
    assert watch.tick(59.9) == []
    assert kinds(watch.tick(60.0)) == [("silent", ATTENTION)]
    assert watch.tick(200.0) == []                       # still silent: not again
    watch.data(201.0)
    assert watch.tick(260.0) == []
    assert kinds(watch.tick(261.0)) == [("silent", ATTENTION)]
    watch.session(False, 262.0)
    assert watch.tick(999.0) == []


def test_lever_held_by_device_time_on_release_and_by_host_time_while_down():
    watch = RigWatch(RULES)
    assert watch.event("lever_down", (), 1_000_000, 0.0) == []
    assert watch.event("lever_up", (), 5_999_999, 0.1) == []            # 4.999999 s: under the limit
    watch.event("lever_down", ("2",), 10_000_000, 1.0)
    assert kinds(watch.event("lever_up", ("2",), 16_000_000, 1.2)) == [("lever held", URGENT)]
    watch.event("lever_down", (), 20_000_000, 2.0)
    assert watch.tick(6.9) == []
    assert kinds(watch.tick(7.1)) == [("lever held", URGENT)]
    assert watch.tick(50.0) == []
    assert watch.event("lever_up", (), 90_000_000, 50.0) == []           # already told while held


def test_lever_held_while_down_follows_the_clock_rate():
    watch = RigWatch(AlertRules(lever_held_s=5, clock_rate=10))
    watch.event("lever_down", (), 0, 0.0)
    assert kinds(watch.tick(0.6)) == [("lever held", URGENT)]             # 0.6 host s = 6 device s


def test_valve_too_long_repeats_at_most_once_per_repeat_s():
    watch = RigWatch(RULES)
    assert watch.event("valve", ("200",), 0, 0.0) == []                   # at the limit: fine
    assert kinds(watch.event("valve", ("201",), 0, 1.0)) == [("valve open too long", URGENT)]
    assert watch.event("valve", ("900",), 0, 20.9) == []
    assert kinds(watch.event("valve", ("900",), 0, 21.0)) == [("valve open too long", URGENT)]
    assert watch.event("valve", ("x",), 0, 99.0) == []                    # not a number: not this rule's


def test_link_down_retrying_then_gone_then_back():
    watch = RigWatch(RULES)
    assert watch.link(LINK_UP, 0.0) == []
    assert kinds(watch.link(LINK_DOWN, 10.0)) == [("disconnected", ATTENTION)]
    assert watch.link(LINK_DOWN, 11.0) == []
    assert watch.tick(39.9) == []
    assert kinds(watch.tick(40.0)) == [("device gone", URGENT)]
    assert watch.tick(90.0) == []
    back = watch.link(LINK_UP, 95.0)
    assert kinds(back) == [("reconnected", INFO)] and "85.0 s" in back[0].text
    assert kinds(watch.link(LINK_ENDED, 96.0)) == [("device gone", URGENT)]


def test_malformed_burst_within_the_window_and_rearming():
    watch = RigWatch(RULES)
    assert watch.malformed(7, 0.0) == []                     # first count is the baseline
    assert watch.malformed(9, 1.0) == []                     # 2 new
    assert kinds(watch.malformed(10, 2.0)) == [("malformed lines", ATTENTION)]
    assert watch.malformed(12, 3.0) == []                    # burst goes on: not again
    watch.tick(20.0)                                         # window passed: re-armed
    assert watch.malformed(13, 21.0) == []
    assert watch.malformed(14, 22.0) == []
    assert kinds(watch.malformed(15, 23.0)) == [("malformed lines", ATTENTION)]


def test_spread_out_malformed_lines_are_no_burst():
    watch = RigWatch(RULES)
    watch.malformed(0, 0.0)
    assert all(watch.malformed(n, 11.0 * n) == [] for n in range(1, 10))


def test_disagreements_fire_on_new_ones_with_repeat_limit():
    watch = RigWatch(RULES)
    assert watch.disagreements(0, "", 0.0) == []
    first = watch.disagreements(1, "rig said hit, rigside computed miss", 1.0)
    assert kinds(first) == [("disagreement", ATTENTION)] and "rig said hit" in first[0].text
    assert watch.disagreements(1, "", 50.0) == []            # nothing new
    assert watch.disagreements(2, "", 10.0) == []            # new, but within repeat_s
    assert kinds(watch.disagreements(3, "", 30.0)) == [("disagreement", ATTENTION)]


def test_plateau_and_store_transitions():
    assert plateau_alert(None, True, 3, "r") is None                        # first verdict: no news
    assert plateau_alert(True, True, 3, "r") is None
    alert = plateau_alert(False, True, 12, "3 sessions at hit rate >= 0.5")
    assert (alert.kind, alert.severity) == ("plateau reached", INFO) and "session 12" in alert.text
    assert plateau_alert(False, False, None, "r") is None
    assert store_alert(False, True, "disk full").severity == URGENT
    assert store_alert(True, True, "disk full") is None


def test_rules_refuse_bad_thresholds():
    assert AlertRules().problems() == []
    problems = AlertRules(silent_minutes=0, lever_held_s=float("nan"), malformed_burst=2.5).problems()
    assert len(problems) == 3 and any("silent_minutes" in p for p in problems)
