"""The animal page: model→UI (what each panel shows) and UI→model (records it emits)."""

from __future__ import annotations

import math
import re
from dataclasses import replace

import numpy as np
import pyqtgraph as pg
import pytest
from PySide6.QtWidgets import QLabel

from monitor.ui import sample
from monitor.ui.animal_page import SESSION_COLUMNS, AnimalPage
from monitor.ui.models import ConditionRecord, Exclusion
from monitor.ui.owners import AnimalBook
from monitor.ui.plots import axis_label
from monitor.ui.theme import ADVISORY


@pytest.fixture
def page(qtbot):
    book = AnimalBook()
    book.update(sample.animal_page_state("cedar"))
    widget = AnimalPage(book, "cedar")
    qtbot.addWidget(widget)
    widget.resize(1030, 680)
    return widget


def labels_text(widget) -> str:
    return "\n".join(label.text() for label in widget.findChildren(QLabel))


# --- model -> UI ---------------------------------------------------------------
def test_every_plot_axis_names_a_unit(page):
    plots = page.findChildren(pg.PlotWidget)
    assert len(plots) == 4
    for plot in plots:
        for side in ("bottom", "left"):
            assert re.search(r"\(.+\)", axis_label(plot, side)), axis_label(plot, side)
    assert axis_label(page.histogram.plot, "bottom") == "interval (ms)"


def test_histogram_shows_todays_and_previous_counts_with_the_window(page):
    today = page.book.state("cedar").today
    x, y = page.histogram.today.getData()
    np.testing.assert_array_equal(x, today.linear.edges_ms)   # stepMode="center": len(x) == len(y) + 1
    np.testing.assert_array_equal(y, today.linear.today)
    # the previous session is drawn as a shape: its counts scaled to today's total (numpy arithmetic)
    scale = today.linear.today.sum() / today.linear.previous.sum()
    np.testing.assert_allclose(page.histogram.previous.getData()[1], today.linear.previous * scale)
    np.testing.assert_allclose(page.histogram.previous.getData()[1].sum(), today.linear.today.sum())
    # its own counts on hover: the bin under the pointer, today's and the previous session's
    k = int(np.argmax(today.linear.previous))
    middle = (today.linear.edges_ms[k] + today.linear.edges_ms[k + 1]) / 2
    assert page.histogram.bin_text(middle) == (f"{today.linear.edges_ms[k]:.0f}–{today.linear.edges_ms[k + 1]:.0f} "
                                               f"ms: today {int(today.linear.today[k])}, previous session "
                                               f"{int(today.linear.previous[k])}")
    assert page.histogram.region.getRegion() == (520.0, 780.0)
    assert page.histogram.target.value() == 650.0
    assert page.histogram.window_text.text() == "window 520–780 ms"


def test_histogram_counts_match_numpy_for_raw_intervals(qtbot):
    # outside check: the bins drawn are numpy.histogram's for the same intervals and edges
    intervals = np.random.default_rng(2).lognormal(np.log(600), 0.3, 500)
    base = sample.animal_page_state("egret", seed=4)
    counts, edges = np.histogram(intervals, bins=np.linspace(0, 1500, 31))
    linear = replace(base.today.linear, edges_ms=edges, today=counts)
    book = AnimalBook()
    book.update(replace(base, today=replace(base.today, linear=linear)))
    page = AnimalPage(book, "egret")
    qtbot.addWidget(page)
    x, y = page.histogram.today.getData()
    np.testing.assert_array_equal(y, counts)
    assert y.sum() == np.sum((intervals >= 0) & (intervals <= 1500))


def test_log_bins_toggle_switches_bins_and_axis(page):
    today = page.book.state("cedar").today
    page.histogram.log_bins.setChecked(True)
    x, y = page.histogram.today.getData()
    np.testing.assert_array_equal(y, today.log.today)
    assert axis_label(page.histogram.plot, "bottom") == "interval (ms, log scale)"
    low, high = page.histogram.region.getRegion()
    assert low == pytest.approx(math.log10(520)) and high == pytest.approx(math.log10(780))
    page.histogram.log_bins.setChecked(False)
    np.testing.assert_array_equal(page.histogram.today.getData()[1], today.linear.today)


def test_a_new_trial_keeps_the_log_axis_and_redraws_the_band_between_both_edges(page):
    page.histogram.log_bins.setChecked(True)
    base = page.book.state("cedar")
    later = replace(base.today, **{k: v for k, v in vars(sample.today_state(np.random.default_rng(5), trials=420)).items()
                                   if k in ("trial_index", "rolling_rate", "rolling_low", "rolling_high")})
    page.book.update(replace(base, today=later))
    assert axis_label(page.histogram.plot, "bottom") == "interval (ms, log scale)"   # not relabelled linear
    assert page.histogram.plot.getPlotItem().getAxis("bottom").logMode
    band = page.rolling.band.path().boundingRect()   # the band's outline spans both new edges
    assert band.top() == pytest.approx(100 * float(np.min(later.rolling_low)))
    assert band.bottom() == pytest.approx(100 * float(np.max(later.rolling_high)))
    assert band.right() == pytest.approx(float(later.trial_index[-1]))


def test_rolling_rate_is_drawn_with_its_band_and_todays_counts(page):
    today = page.book.state("cedar").today
    x, y = page.rolling.rate.getData()
    np.testing.assert_allclose(y, 100 * today.rolling_rate)
    np.testing.assert_allclose(page.rolling.high.getData()[1], 100 * today.rolling_high)
    assert "95 % interval" in page.rolling.title.text()
    assert page.rolling.now.text().startswith("now ")
    for key in ("trials", "hits", "premature", "lone", "omission"):
        assert page.figures[key].value.text() == str(getattr(today, key))


@pytest.mark.slow
def test_learning_curve_marks_stages_criterion_and_plateau_with_reason(page):
    curve = page.book.state("cedar").curve
    drawn = [item.getData() for item in page.curve.stage_items if item.isVisible()]
    x = np.concatenate([d[0] for d in drawn])
    np.testing.assert_allclose(np.concatenate([d[1] for d in drawn]), 100 * curve.measure)
    assert 18.0 not in x                                       # the excluded session is left out
    shown = [m.label.format for m in page.curve.stage_marks if m.isVisible()]
    assert shown == ["shaping", "wide window", "final"]
    # each stage its own shape and its own legend label (never colour alone)
    symbols = [item.opts["symbol"] for item in page.curve.stage_items if item.isVisible()]
    assert len(set(symbols)) == 3
    legend = [label.text for _, label in page.curve.legend.items]
    assert legend[0] == "stage shaping" and legend[2] == "stage final (plateau judged here)"
    assert page.curve.criterion.value() == pytest.approx(50.0)
    assert page.curve.plateau.value() == 14
    assert page.plateau_line.text() == f"Plateau: reached. {curve.plateau_reason}"


def test_consolidation_shows_measures_first_then_model_with_interval_caveat_and_advisory(page):
    c = page.book.state("cedar").consolidation
    m = page.consolidation.measures
    assert m["trials"].text() == "3,820" and m["sessions"].text() == "10"
    assert m["error"].text() == "0.094" and m["cv"].text() == "0.190"
    assert m["drops"].text().count("session ") == 4
    assert "warm-up" in page.consolidation.warmup_note.text()
    assert re.match(r"Session 24: 0\.\d\d \(90 % interval 0\.\d\d–0\.\d\d\), estimated",
                    page.consolidation.estimate.text())
    assert page.consolidation.forecast.text() == "Forecast: 0.80 in 4–11 more sessions (model range)."
    assert page.consolidation.caveat.text() == c.caveat and "not proof" in c.caveat
    assert page.consolidation.advisory.text() == ADVISORY
    np.testing.assert_allclose(page.consolidation.low.getData()[1], c.fraction_low)


def test_unconstrained_forecast_and_empty_fit_say_so(page):
    state = page.book.state("cedar")
    empty = replace(state.consolidation, session=np.empty(0), fraction=np.empty(0), fraction_low=np.empty(0),
                    fraction_high=np.empty(0), status=(), forecast_low=None, forecast_high=None)
    page.book.update(replace(state, consolidation=empty))
    assert page.consolidation.estimate.text().startswith("No fit yet")
    assert page.consolidation.forecast.text() == "Forecast: not constrained by the data yet."


def test_a_point_only_where_the_data_support_one_and_no_passed_level(page):
    state = page.book.state("cedar")
    c = state.consolidation
    status = c.status[:-2] + ("not constrained",) * 2
    loose = replace(c, status=status, estimate_text="not constrained: no point value (90 % interval 0.00–1.00)",
                    forecast_text="already above 0.80")
    page.book.update(replace(state, consolidation=loose))
    y = page.consolidation.fraction.getData()[1]
    assert np.all(np.isnan(y[-2:])) and np.all(np.isfinite(y[2:-2]))  # the line has no point there
    marked = page.consolidation.marks.getData()[0]
    assert len(marked) == sum(s == "estimated" for s in status) and 24 not in marked
    assert page.consolidation.estimate.text() == "Session 24: not constrained: no point value (90 % interval 0.00–1.00)"
    assert page.consolidation.forecast.text() == "Forecast: already above 0.80."


def test_session_table_shows_exclusions_and_conditions_as_plain_text(page):
    table = page.sessions.table
    rows = page.book.state("cedar").sessions
    assert table.rowCount() == len(rows)
    assert [table.horizontalHeaderItem(c).text() for c in range(table.columnCount())] == list(SESSION_COLUMNS)
    excluded = next(r for r in range(table.rowCount()) if table.item(r, 9).text() == "excluded")
    assert table.item(excluded, 10).text() == "lever stuck for 20 min"
    assert any(table.item(r, 11).text() == "saline sham 0.5 µL" for r in range(table.rowCount()))


def test_only_replaced_parts_are_redrawn(page):
    state = page.book.state("cedar")
    before = dict(page.redraws)
    page.book.update(replace(state, today=sample.today_state(np.random.default_rng(7))))
    assert page.redraws["today"] == before["today"] + 1
    assert page.redraws["curve"] == before["curve"] and page.redraws["consolidation"] == before["consolidation"]
    assert not page.book.update(replace(page.book.state("cedar")))     # same parts: no signal at all


def test_page_ignores_other_animals_and_stops_listening_when_closed(page):
    other = sample.animal_page_state("birch")
    page.book.update(other)
    assert page.title.text() == "cedar"
    page.close()
    trials_shown = page.figures["trials"].value.text()
    page.book.update(replace(page.book.state("cedar"), today=sample.today_state(np.random.default_rng(1),
                                                                                 trials=17)))
    assert page.figures["trials"].value.text() == trials_shown


def test_care_line_carries_the_advisory(page):
    assert page.care.text().startswith("Water today")
    assert page.care_advisory.text() == ADVISORY


# --- UI -> model ---------------------------------------------------------------
def test_exclusion_needs_a_reason_then_emits_the_record(page, qtbot):
    page.sessions.select_session(20)
    dialog = page.sessions.open_exclusion()
    assert dialog is not None
    with qtbot.assertNotEmitted(page.exclusion_requested):
        assert not dialog.try_accept()
    assert dialog.problem_line.text().startswith("✖ Reason:")
    dialog.reason.setText("  cable chewed  ")
    with qtbot.waitSignal(page.exclusion_requested) as emitted:
        assert dialog.try_accept()
    assert emitted.args == [Exclusion(animal="cedar", session=20, reason="cable chewed")]


def test_condition_dialog_emits_what_dose_volume_and_sham(page, qtbot):
    dialog = page.sessions.open_condition(session=22)
    dialog.what.setText("muscimol")
    dialog.dose.setText("0.5 mg/kg")
    dialog.volume.setValue(0.3)
    dialog.sham.setChecked(False)
    with qtbot.waitSignal(page.condition_requested) as emitted:
        assert dialog.try_accept()
    assert emitted.args == [ConditionRecord(animal="cedar", session=22, what="muscimol", dose="0.5 mg/kg",
                                            volume_ul=0.3, sham=False, note="")]


def test_condition_without_volume_is_none_and_nothing_selected_opens_nothing(page, qtbot):
    assert page.sessions.open_exclusion() is None           # no row selected
    dialog = page.sessions.open_condition(session=3)
    dialog.what.setText("saline")
    dialog.sham.setChecked(True)
    with qtbot.waitSignal(page.condition_requested) as emitted:
        dialog.try_accept()
    assert emitted.args[0].volume_ul is None and emitted.args[0].sham


def test_a_new_animal_with_nothing_yet_shows_dashes(qtbot):
    from monitor.ui.models import AnimalPageState

    book = AnimalBook()
    book.update(AnimalPageState(animal="newt", rig=None, protocol="two-press 650 ms (v3)", today=None, curve=None,
                                consolidation=None))
    page = AnimalPage(book, "newt")
    qtbot.addWidget(page)
    page.resize(1030, 680)
    page.show()
    qtbot.waitExposed(page)
    assert page.where.text() == "not in a box · two-press 650 ms (v3)"
    assert page.figures["trials"].value.text() == "–"
    assert page.sessions.table.rowCount() == 0 and page.care.isHidden()
    empty = sample.today_state(np.random.default_rng(0), trials=1)
    page.book.update(replace(book.state("newt"), today=replace(empty, trial_index=np.empty(0),
                                                               rolling_rate=np.empty(0), rolling_low=np.empty(0),
                                                               rolling_high=np.empty(0))))
    assert page.rolling.now.text() == "no trials yet"


def test_eligibility_verdict_shows_with_the_advisory_and_hides_without(page):
    state = page.book.state("cedar")
    assert page.eligibility_line.text() == f"Eligibility (rule's verdict): {state.eligibility_text}"
    page.book.update(replace(state, care_text="", eligibility_text=""))
    assert page.eligibility_line.isHidden() and page.care_advisory.isHidden()
    page.book.update(replace(state, care_text=""))
    assert not page.eligibility_line.isHidden() and not page.care_advisory.isHidden()


def test_an_exclusion_is_undone_with_its_own_reason(page, qtbot):
    excluded = next(r.index for r in page.book.state("cedar").sessions if r.excluded)
    page.sessions.select_session(excluded)
    assert page.sessions.include_button.isEnabled() and not page.sessions.exclude_button.isEnabled()
    dialog = page.sessions.open_exclusion(undo=True)
    with qtbot.assertNotEmitted(page.exclusion_requested):
        assert not dialog.try_accept()
    assert "counts again" in dialog.problem_line.text()
    dialog.reason.setText("lever was fine")
    with qtbot.waitSignal(page.exclusion_requested) as emitted:
        assert dialog.try_accept()
    assert emitted.args == [Exclusion(animal="cedar", session=excluded, reason="lever was fine", excluded=False)]
    page.sessions.select_session(excluded - 1)
    assert not page.sessions.include_button.isEnabled()
