"""Water ledger: session water from rig events, daily totals, weights and care alerts.

Check values are hand arithmetic (40 x 30 µL = 1.2 mL; 25 ms x 1.2 µL/ms = 30 µL;
21.3 g / 25.0 g = 85.2 %); default thresholds are common practice (REFERENCES.md, water restriction).
"""

from __future__ import annotations

from datetime import date, datetime, timedelta, timezone

import pytest

from drivers.config import ConfigError, TomlFile
from drivers.wire import Event, decode_all, encode_event, encode_header
from monitor.core.care.ledger import (ALERT, CARE_SHEET_COLUMNS, NOTICE, WARNING, AnimalCare, CareConfig, HealthNote,
                               Supplement, Weighing, care_sheet, daily_minimum_ml, day_summary, parse_care,
                               percent_of_baseline, species_figure)
from monitor.core.care.water import session_water

CET = timezone(timedelta(hours=1))
DAY = date(2026, 3, 2)


def at(hour: int, minute: int = 0, day: date = DAY) -> datetime:
    return datetime(day.year, day.month, day.day, hour, minute, tzinfo=CET)


def events(lines: list[bytes]) -> list[Event]:
    return [r for r in decode_all(encode_header() + b"".join(lines)) if isinstance(r, Event)]


def water(lines, **options):
    settings = dict(ul_per_ms=1.2, reward_ul=None, max_valve_ms=250.0, lick_window_ms=2000.0)
    settings.update(options)
    return session_water(events(lines), **settings)


def test_forty_rewards_of_30_ul_make_1_2_ml():
    lines = []
    for n in range(40):
        t = 1_000_000 + n * 5_000_000
        lines += [encode_event(t, "reward", 30), encode_event(t + 300_000, "lick")]
    w = water(lines)
    assert w.deliveries == 40 and w.unconfirmed == 0 and w.licks == 40
    assert w.earned_ml == pytest.approx(1.2)  # hand arithmetic: 40 x 30 µL = 1.2 mL


def test_valve_time_times_calibration():
    w = water([encode_event(1000, "valve", 25), encode_event(200_000, "lick")])
    assert w.earned_ul == pytest.approx(30.0)  # hand arithmetic: 25 ms x 1.2 µL/ms = 30 µL
    assert water([encode_event(1000, "valve", 25)], ul_per_ms=None).unknown_volume == 1


def test_bare_reward_uses_the_protocol_size_and_unknown_volumes_are_counted():
    assert water([encode_event(10, "reward")], reward_ul=12.5).earned_ul == 12.5
    odd = Event(20, "reward", ("lots",), 20, 1, 2, 0, 0)  # the wire decoder refuses this; other sources may not
    w = session_water(events([encode_event(10, "reward")]) + [odd], ul_per_ms=1.2, reward_ul=None,
                      max_valve_ms=250.0, lick_window_ms=2000.0)
    assert w.unknown_volume == 2 and w.earned_ul == 0


def test_licks_confirm_deliveries_within_the_window_and_clock_segment():
    lines = [encode_event(1_000_000, "reward", 30), encode_event(2_500_000, "lick"),   # +1.5 s: confirmed
             encode_event(10_000_000, "reward", 30), encode_event(12_500_000, "lick"),  # +2.5 s: too late
             encode_event(20_000_000, "lick"), encode_event(20_100_000, "reward", 30),  # lick before: no
             encode_event(30_000_000, "reward", 30)]
    lines.append(encode_header() + encode_event(30_000_500, "lick"))  # board reset: a new clock segment
    w = water(lines)
    assert (w.deliveries, w.unconfirmed) == (4, 3)


def test_long_valve_openings_are_listed():
    w = water([encode_event(10, "valve", 25), encode_event(20, "valve", 900)])
    assert w.long_valves_ms == (900.0,)


def test_percent_of_baseline_check_value():
    assert percent_of_baseline(21.3, 25.0) == pytest.approx(85.2)  # hand arithmetic


def session(ml: float, end: datetime, lines=None, name="s1"):
    w = water(lines or [encode_event(10, "reward", ml * 1000), encode_event(20, "lick")])
    return type(w)(name, end, w.earned_ul, w.deliveries, w.unconfirmed, w.licks, w.unknown_volume,
                   w.long_valves_ms)


def animal(**parts) -> AnimalCare:
    values = dict(animal="heron", baseline_g=25.0, sessions=(session(0.6, at(11)),),
                  weighings=(Weighing(at(9), 21.3, "ana"),))
    values.update(parts)
    return AnimalCare(**values)


def kinds(summary):
    return {a.kind: a.level for a in summary.alerts}


def test_daily_total_against_the_minimum_and_the_supplement_owed():
    # 1.0 ml/day default (mouse, REFERENCES.md: from memory) is larger than 4 ml/100 g x 21.3 g = 0.852 ml
    config = CareConfig()
    morning = day_summary(animal(), DAY, config, at(14))
    assert morning.minimum_ml == pytest.approx(1.0) and morning.minimum_rule == "1 ml/day"
    assert morning.earned_ml == pytest.approx(0.6) and morning.owed_ml == pytest.approx(0.4)
    assert kinds(morning)["supplement_owed"] == NOTICE  # before the 17:00 end of day
    evening = day_summary(animal(), DAY, config, at(17, 30))
    assert kinds(evening)["supplement_owed"] == ALERT
    given = day_summary(animal(supplements=(Supplement(at(16), 0.4, "ben"),)), DAY, config, at(17, 30))
    assert given.total_ml == pytest.approx(1.0) and given.owed_ml == pytest.approx(0.0)
    assert "supplement_owed" not in kinds(given) and given.supplements_by == ("ben",)


def test_minimum_per_kilogram():
    config = parse_care({"daily_minimum_ml_per_kg": 40})  # ~40 ml/kg/day, REFERENCES.md (from memory)
    assert config.daily_minimum_ml is None
    assert daily_minimum_ml(config, 25.0) == pytest.approx(1.0)
    both = parse_care({"daily_minimum_ml_per_kg": 40, "daily_minimum_ml": 1.5})
    assert daily_minimum_ml(both, 25.0) == 1.5
    s = day_summary(animal(baseline_g=None, weighings=()), DAY, config, at(10))
    assert s.minimum_ml is None and kinds(s)["minimum_unknown"] == WARNING


def test_weight_levels_are_strictly_below_85_and_80_percent():
    config = CareConfig()
    assert "weight_warning" not in kinds(day_summary(animal(), DAY, config, at(12)))  # 85.2 %
    low = day_summary(animal(weighings=(Weighing(at(9), 21.2, "ana"),)), DAY, config, at(12))
    assert low.percent_of_baseline == pytest.approx(84.8) and kinds(low)["weight_warning"] == WARNING
    limit = day_summary(animal(weighings=(Weighing(at(9), 19.9, "ana"),)), DAY, config, at(12))
    assert kinds(limit)["weight_limit"] == ALERT and "weight_warning" not in kinds(limit)
    edge = day_summary(animal(weighings=(Weighing(at(9), 20.0, "ana"),)), DAY, config, at(12))
    assert "weight_limit" not in kinds(edge) and "weight_warning" in kinds(edge)  # exactly 80 %


def test_weight_missing_today():
    yesterday = (Weighing(at(9, day=DAY - timedelta(days=1)), 22.0, "ana"),)
    s = day_summary(animal(weighings=yesterday), DAY, CareConfig(), at(18))
    assert kinds(s)["weight_missing"] == ALERT and s.weighed_on == DAY - timedelta(days=1)
    assert s.weight_g == 22.0  # the latest known weight still shows
    twice_weekly = parse_care({"weigh_every_days": 3})
    assert "weight_missing" not in kinds(day_summary(animal(weighings=yesterday), DAY, twice_weekly, at(18)))


def test_no_fluid_for_too_long():
    config = CareConfig()  # alert at 20 h, before the commonly cited 24 h limit (REFERENCES.md)
    earlier = (session(0.5, at(11, day=DAY - timedelta(days=1))),)
    assert "no_fluid" not in kinds(day_summary(animal(sessions=earlier), DAY, config, at(6)))  # 19 h
    assert kinds(day_summary(animal(sessions=earlier), DAY, config, at(7)))["no_fluid"] == ALERT  # 20 h
    # no fluid on record at all is not known to be a lack of fluid: no alarm (the day's own state says it)
    never = day_summary(animal(sessions=()), DAY, config, at(7))
    assert "no_fluid" not in kinds(never)
    fresh = day_summary(animal(), DAY, config, at(12))
    assert "no_fluid" not in kinds(fresh)


def test_valve_and_lick_alerts_reach_the_day():
    long_valve = session(0, at(11), [encode_event(10, "valve", 600), encode_event(20, "lick")], "s7")
    silent = session(0, at(12), [encode_event(10, "reward", 30), encode_event(99, "reward", 30)], "s8")
    s = day_summary(animal(sessions=(long_valve, silent)), DAY, CareConfig(), at(13))
    messages = {a.kind: a.message for a in s.alerts}
    assert kinds(s)["valve_too_long"] == ALERT and "600 ms in session s7" in messages["valve_too_long"]
    assert kinds(s)["no_licks"] == WARNING


def test_care_sheet_rows():
    cohort = [animal(animal="wren", notes=(HealthNote(at(9), "ana", "coat fine"),)), animal()]
    rows = [s.row() for s in care_sheet(cohort, DAY, CareConfig(), at(18))]
    assert [r["animal"] for r in rows] == ["heron", "wren"]
    assert all(tuple(r) == CARE_SHEET_COLUMNS for r in rows)
    assert rows[1]["notes"] == "coat fine" and rows[0]["percent_of_baseline"] == 85.2
    assert rows[0]["total_ml"] == 0.6 and "supplement of 0.40 ml owed" in rows[0]["alerts"].lower()


def test_care_table_errors_name_file_line_and_key():
    text = "[care]\nend_of_day = \"17:00\"\nweight_limit_percent = 90\n"
    doc = TomlFile(text, "site.toml")
    with pytest.raises(ConfigError) as caught:
        parse_care(doc.data["care"], doc)
    assert (caught.value.path, caught.value.line, caught.value.key) == ("site.toml", 3, "[care] weight_limit_percent")
    for bad in ({"end_of_day": "5pm"}, {"no_fluid_hours": 0}, {"weigh_every_days": 0}, {"valve_ms": 1}):
        with pytest.raises(ConfigError):
            parse_care(bad)
    assert parse_care({"end_of_day": "16:30"}).end_of_day.hour == 16


def test_times_need_an_offset():
    with pytest.raises(ValueError):
        Supplement(datetime(2026, 3, 2, 10), 0.5, "ana")


def test_a_reward_above_the_protocols_limit_is_an_unknown_volume_not_water():
    # 2 x 30 uL counted, the 900 uL line is not: 60 uL (arithmetic)
    lines = [encode_event(10, "reward", 30), encode_event(20, "reward", 900), encode_event(30, "reward", 30)]
    water = session_water(events(lines), ul_per_ms=None, reward_ul=30, max_valve_ms=250, lick_window_ms=2000,
                          max_reward_ul=60)
    assert water.earned_ul == 60 and water.unknown_volume == 1 and water.deliveries == 3
def test_a_day_with_nothing_recorded_yet_is_a_state_not_an_alarm():
    # opened after 17:00, an animal whose day has no record: no owed, no-fluid or weight-missing alarm
    yesterday = DAY - timedelta(days=1)
    care = animal(sessions=(session(0.6, at(11, day=yesterday)),), weighings=(Weighing(at(9, day=yesterday), 22.0,
                                                                                       "ana"),))
    s = day_summary(care, DAY, CareConfig(), at(18))
    assert s.state == "no record today"
    assert set(kinds(s)) == {"no_record_today"} and kinds(s)["no_record_today"] == WARNING
    assert day_summary(care, DAY, CareConfig(), at(10)).alerts[0].level == NOTICE


def test_a_running_session_holds_back_the_owed_and_no_fluid_alarms():
    yesterday = DAY - timedelta(days=1)
    w = session(0.03, at(18))
    running = type(w)("s9", None, w.earned_ul, w.deliveries, w.unconfirmed, w.licks, w.unknown_volume,
                      w.long_valves_ms, start=at(17, 50))
    care = animal(sessions=(session(0.5, at(11, day=yesterday)), running))
    s = day_summary(care, DAY, CareConfig(), at(18))     # 31 h after the last fluid, but drinking now
    assert s.state == "session running"
    assert "session_running" in kinds(s) and "supplement_owed" not in kinds(s) and "no_fluid" not in kinds(s)


def test_the_minimum_follows_the_species_and_weight():
    # hand arithmetic: 310 g x 4 ml/100 g = 12.4 ml (default); a lab's rat figure 5 ml/100 g -> 15.5 ml
    config = CareConfig()
    rat = animal(baseline_g=330.0, weighings=(Weighing(at(9), 310.0, "ana"),), species="Rattus norvegicus")
    s = day_summary(rat, DAY, config, at(12))
    assert s.minimum_ml == pytest.approx(12.4) and "default" in s.minimum_rule
    lab = parse_care({"species": {"rat": 5}})
    s = day_summary(rat, DAY, lab, at(12))
    assert s.minimum_ml == pytest.approx(15.5) and "rat figure" in s.minimum_rule
    assert species_figure(lab, "Mus musculus") == ("mouse", 4.0) and species_figure(lab, "zebra finch") is None
    assert daily_minimum_ml(lab, 25.0, "mouse") == pytest.approx(1.0)   # ~1 ml/day for a mouse (REFERENCES.md)
    # a lab's own fixed rule replaces the per-100 g default
    assert parse_care({"daily_minimum_ml": 1.5}).daily_minimum_ml_per_100g is None
    with pytest.raises(ConfigError):
        parse_care({"species": {"rat": 0}})
