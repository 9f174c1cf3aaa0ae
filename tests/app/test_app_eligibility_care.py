"""monitor.app.window.eligibility_care: verdict and care lines, alerts, decisions and care records through a real store."""

from __future__ import annotations

import csv
from datetime import datetime

import pytest
from PySide6.QtGui import QImage

from drivers.wire import Event
from monitor.app.window.eligibility_care import CLEARED_BY, care_row, decision_view
from monitor.app.services.judging import Judgement
from monitor.core.eligibility.assignment import blinding_key
from monitor.core.care.ledger import AnimalCare, CareConfig, Weighing, day_summary
from monitor.core.care.water import session_water
from monitor.core.eligibility.rules import parse_eligibility
from monitor.core.eligibility.figures import AnimalFigures
from monitor.core.eligibility.verdict import evaluate
from monitor.store.db import open_store
from monitor.store.decisions import entries
from monitor.ui.care_panel import CareEntry, CarePanel
from monitor.ui.decision_dialog import DecisionDialog
from monitor.ui.decision_history import DecisionHistory
from fixtures.protocols import protocol_toml
from fixtures.stores import imported_store, rewarded_session
from fixtures.windows import window_over

pytestmark = pytest.mark.slow  # windows, subprocesses or simulated histories: seconds per test

PROTOCOL = protocol_toml(reward_ul=30, extra="""
[eligibility]
cohort = "shore"

[eligibility.groups.any]
label = "any hit rate"
plateau = false
min_hit_rate = 0.0
""")


@pytest.fixture
def app(qapp, tmp_path):
    start = datetime.now().astimezone().replace(hour=0, minute=5, second=0, microsecond=0)
    # 40 rewards x 30 µL = 1.2 mL (hand arithmetic), each confirmed by a lick
    db = imported_store(tmp_path, {"heron_s01.rsw": rewarded_session(start, 40, licks=True)}, PROTOCOL)
    with window_over(db) as (controller, window):
        yield controller, window, db


def kinds(controller) -> list[str]:
    return [a.kind for a in controller.alert_book.alerts()]


def test_judged_and_cared_for_from_the_store(app, qtbot, tmp_path):
    controller, window, db = app
    records = controller.decisions_and_care
    qtbot.waitUntil(lambda: "heron" in records.verdicts and "heron" in records.summaries, timeout=20000)
    assert records.verdicts["heron"].state == "in window: any hit rate"
    assert records.summaries["heron"].earned_ml == pytest.approx(1.2)     # 40 x 30 µL (hand arithmetic)
    assert "window opened" in kinds(controller) and "weight missing" in kinds(controller)
    # the page shows both lines
    page = window.open_animal("heron")
    qtbot.waitUntil(lambda: page.eligibility_line.text().startswith("Eligibility (rule's verdict): in window"),
                    timeout=20000)
    assert page.care.text().startswith("Care today: Water 1.20 ml of 1.00 ml minimum")
    # a second check raises nothing new: each alert once per day and level
    count = len(kinds(controller))
    records.update()
    qtbot.waitUntil(lambda: not controller.jobs.titles(), timeout=20000)
    assert len(kinds(controller)) == count
    # care records through the window: baseline 25.0 g, weight 21.3 g -> 85.2 % (hand arithmetic)
    records.open_care()
    panel = records.care_panel
    assert isinstance(panel, CarePanel)
    records.log_care(CareEntry("heron", "baseline", 25.0, "", "ana"))
    qtbot.waitUntil(lambda: not controller.jobs.titles(), timeout=20000)
    records.log_care(CareEntry("heron", "weight", 21.3, "", "ana"))
    qtbot.waitUntil(lambda: records.summaries["heron"].weight_g == 21.3 and not controller.jobs.titles(), timeout=20000)
    assert round(records.summaries["heron"].percent_of_baseline, 1) == 85.2
    # the weight is logged: "weight missing" no longer holds and leaves the open list (kept, acknowledged by rigside)
    missing = [a for a in controller.alert_book.alerts() if a.kind == "weight missing"]
    assert len(missing) == 1 and missing[0].acknowledged_by == CLEARED_BY
    assert "weight missing" not in [a.kind for a in controller.alert_book.open_alerts()]
    qtbot.waitUntil(lambda: panel.table.rowCount() == 1 and panel.table.item(0, 8).text() == "85.2", timeout=20000)
    panel.resize(1300, 700)
    panel.grab().save(str(tmp_path / "care.png"))
    # the sheet as CSV and as a printable page
    records.export("csv", str(tmp_path / "sheet.csv"))
    qtbot.waitUntil(lambda: (tmp_path / "sheet.csv").exists() and not controller.jobs.titles(), timeout=20000)
    row = next(csv.DictReader(open(tmp_path / "sheet.csv", encoding="utf-8")))
    assert (row["animal"], float(row["earned_ml"]), float(row["percent_of_baseline"])) == ("heron", 1.2, 85.2)
    records.export("png", str(tmp_path / "sheet.png"))
    assert QImage(str(tmp_path / "sheet.png")).width() == 1754


def test_a_decision_against_the_rule_is_recorded_with_the_snapshot_shown(app, qtbot):
    controller, window, db = app
    records = controller.decisions_and_care
    records.open_decision("heron")
    qtbot.waitUntil(lambda: isinstance(records.dialog, DecisionDialog), timeout=20000)
    dialog = records.dialog
    shown = dict(dialog.view.figures)
    assert shown["plateau"] == "not reached" and dialog.view.rule_state == "in window: any hit rate"
    dialog.decision.setCurrentText("excluded")          # the window is open: the rule does not support this
    dialog.operator.setText("ana")
    dialog.reason.setText("the vet advised a pause")
    assert "differs" in dialog.agreement.text()
    assert dialog.try_accept()
    conn = open_store(db, readonly=True)
    try:
        qtbot.waitUntil(lambda: len(entries(conn, "heron")) == 1, timeout=20000)
        entry = entries(conn, "heron")[0]
    finally:
        conn.close()
    d = entry.decision
    assert (d.decision, d.operator, d.disagrees_with_rule, d.rule_state) == (
        "excluded", "ana", True, "in window: any hit rate")
    assert d.snapshot.data()["verdict"]["state"] == "in window: any hit rate"
    assert d.snapshot.figures().measures["hit_rate"] == pytest.approx(1.0)
    records.open_history("heron")
    qtbot.waitUntil(lambda: isinstance(records.dialog, DecisionHistory), timeout=20000)
    history = records.dialog
    assert history.table.rowCount() == 1 and history.table.item(0, 6).text() == "no (both kept)"
    assert history.chain.text().startswith("✔ Decision log intact: 1 entry")


def test_blinded_decisions_show_codes_and_compare_with_the_real_group():
    rule = parse_eligibility({"blinded": True, "groups": {"drug": {"plateau": False, "min_hit_rate": 0.5},
                                                          "vehicle": {"plateau": False, "max_hit_rate": 0.5}}})
    figures = AnimalFigures("heron", "p", 1, session=3, measures={"hit_rate": 0.8})
    key = blinding_key(["drug", "vehicle"], b"0123456789abcdef")
    coded = rule.under_codes(key.codes)
    view = decision_view(Judgement(figures, coded, evaluate(coded, figures), key), ())
    shown = {text for _, text in view.groups}
    assert shown == set(key.codes.values()) and not shown & {"drug", "vehicle"} and view.blinded
    assert "drug" not in view.rule_state + view.rule_reason and key.code_of("drug") in view.rule_state
    assert view.agrees[("eligible", key.code_of("drug"))] is True      # drug's window is open (hit rate 0.8)
    assert view.agrees[("eligible", key.code_of("vehicle"))] is False
    assert view.agrees[("excluded", "")] is False
    assert view.can_draw and "group code" in view.draw_note


def test_care_row_check_values():
    # valve 25 ms at 1.2 µL/ms = 30 µL; 21.3 g against a 25.0 g baseline = 85.2 % (hand arithmetic)
    now = datetime.now().astimezone()
    events = [Event(1_000_000, "valve", ("25",), "1000", 0, 1, 0, 0), Event(1_100_000, "lick", (), "1100", 0, 2, 0, 0)]
    water = session_water(events, ul_per_ms=1.2, reward_ul=None, max_valve_ms=250, lick_window_ms=2000,
                          session="1", end=now)
    assert water.earned_ul == pytest.approx(30.0)
    care = AnimalCare("heron", 25.0, (water,), (), (Weighing(now, 21.3, "ana"),))
    row = care_row(day_summary(care, now.date(), CareConfig(), now))
    assert row.cells[0] == "0.03" and row.cells[5] == "21.3" and row.cells[6] == "85.2"


def test_a_day_with_nothing_recorded_reads_as_a_state_and_counts_in_words():
    from datetime import timedelta

    from monitor.app.window.eligibility_care import care_text

    now = datetime.now().astimezone()
    yesterday = now - timedelta(days=1)
    care = AnimalCare("heron", 25.0, (), (), (Weighing(yesterday, 21.3, "ana"),))
    summary = day_summary(care, now.date(), CareConfig(), now)
    assert care_text(summary) == "Care today: nothing recorded yet (no session, weighing or supplement)."
    row = care_row(summary)
    assert row.state == "no record today" and [a[0] for a in row.alerts] in (["notice"], ["warning"])
    weighed = AnimalCare("heron", 25.0, (), (), (Weighing(now, 21.3, "ana"),))
    text = care_text(day_summary(weighed, now.date(), CareConfig(), now))
    assert "worst" not in text and "care alert" in text and "alert(s)" not in text


def test_cohort_row_from_the_figures_the_verdict_and_the_care_day():
    from monitor.app.window.eligibility_care import cohort_row

    now = datetime.now().astimezone()
    events = [Event(1_000_000, "valve", ("25",), "1000", 0, 1, 0, 0), Event(1_100_000, "lick", (), "1100", 0, 2, 0, 0)]
    water = session_water(events, ul_per_ms=1.2, reward_ul=None, max_valve_ms=250, lick_window_ms=2000,
                          session="1", end=now)
    care = day_summary(AnimalCare("heron", 25.0, (water,), (), (Weighing(now, 21.3, "ana"),)), now.date(),
                       CareConfig(), now)
    figures = AnimalFigures(animal="heron", protocol_name="p", protocol_version=1, session=14, plateau_reached=True,
                            plateau_session=9, sessions_since_plateau=5, trials_since_plateau=900, measures={})
    row = cohort_row("heron", "final", figures, None, care)
    # 25 ms x 1.2 µL/ms = 30 µL = 0.03 ml; 21.3 g of 25.0 g = 85.2 % (hand arithmetic)
    assert row.cells == ("heron", "final", "14", "reached at session 9", "no fit yet", "no rule", "0.03 of 1.00",
                         "21.3 (85.2 %)")
    assert row.keys[2] == 14 and row.keys[6] == pytest.approx(0.03)
    empty = cohort_row("wren", None, None, None, None)
    assert empty.cells[1:] == ("not known", "none", "not judged yet", "no fit yet", "no rule", "no record today",
                               "no weight")
