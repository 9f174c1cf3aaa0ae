"""The decision dialog, the care window and the decision history: model→UI and UI→model, offscreen."""

from __future__ import annotations

import os
from datetime import date
from pathlib import Path

import pytest
from PySide6.QtCore import Qt
from PySide6.QtWidgets import QLabel

from monitor.ui.care_panel import CAUTION, CareEntry, CarePanel, CareRow, CareView, sheet_image, state_text
from monitor.ui.decision_dialog import AGREES, DIFFERS, DecisionDialog, DecisionRequest, DecisionView
from monitor.ui.decision_history import DecisionHistory, HistoryView

SHOTS = Path(os.environ.get("RIGSIDE_SHOTS", "/tmp/rigside-shots"))

VIEW = DecisionView(
    animal="cedar", rule_state="in window: plateaued, not consolidated",
    rule_reason="Window open for plateaued, not consolidated (plateau at session 8; sessions since plateau 2 "
                "(needs ≤ 6)).",
    figures=(("protocol", "two-press 650 ms v1"), ("plateau", "reached at session 8"),
             ("sessions since plateau", "2"), ("hit rate (latest session)", "71.0 %"),
             ("slow-state fraction (model)", "0.30 (90 % interval 0.25–0.35), estimated")),
    groups=(("early", "plateaued, not consolidated"), ("late", "consolidated")),
    agrees={("eligible", "early"): True, ("eligible", ""): True, ("excluded", ""): False,
            ("excluded", "early"): False, ("assigned", "early"): True},
    earlier=((3, "deferred by ana, 2026-03-02T10:00:00+01:00"),), operator="ana", can_draw=True,
    draw_note="The group is drawn from cohort 'spring-timing''s permuted blocks (blocks-sha256-v1, seed recorded), "
              "never from the figures.")


def labels(widget) -> str:
    return "\n".join(label.text() for label in widget.findChildren(QLabel))


def save(widget, name: str) -> None:
    SHOTS.mkdir(parents=True, exist_ok=True)
    widget.grab().save(str(SHOTS / name))


@pytest.fixture
def dialog(qtbot):
    widget = DecisionDialog(VIEW)
    qtbot.addWidget(widget)
    widget.resize(900, 640)
    return widget


# --- decision dialog: model -> UI ------------------------------------------------------
def test_the_dialog_shows_the_caution_the_verdict_and_the_frozen_figures(dialog):
    text = labels(dialog)
    assert "advisory" in dialog.caution.text() and "veterinarian" in dialog.caution.text()
    assert "animal-care committee" in dialog.caution.text()
    assert dialog.verdict.text() == "Rule's verdict: in window: plateaued, not consolidated"
    assert "sessions since plateau 2 (needs ≤ 6)" in text
    for caption, value in VIEW.figures:
        assert caption in text and value in text
    save(dialog, "decision-dialog.png")


def test_agreement_is_said_in_words_and_follows_the_choice(dialog):
    dialog.decision.setCurrentText("eligible")
    dialog.group.setCurrentIndex(1)          # early
    assert dialog.agreement.text() == AGREES and dialog.agreement.text().startswith("✔")
    dialog.decision.setCurrentText("excluded")
    assert dialog.agreement.text() == DIFFERS and "recorded" in DIFFERS and dialog.agreement.text().startswith("▲")


def test_blinded_groups_show_only_codes(qtbot):
    view = DecisionView("cedar", "in window: drug arm", "open.", (), groups=(("G-7Q", "G-7Q"), ("G-K3", "G-K3")),
                        blinded=True)
    widget = DecisionDialog(view)
    qtbot.addWidget(widget)
    shown = [widget.group.itemText(i) for i in range(widget.group.count())]
    assert shown[1:] == ["G-7Q", "G-K3"]
    assert "Group code" in labels(widget)


def test_the_random_draw_is_offered_for_assigned_only_and_shown_locked(qtbot):
    view = DecisionView("cedar", "in window: G-7Q, G-K3", "open.", (), groups=(("G-7Q", "G-7Q"), ("G-K3", "G-K3")),
                        blinded=True, can_draw=True, draw_note="The group code is drawn from cohort 'shore'.",
                        operator="ana")
    widget = DecisionDialog(view)
    qtbot.addWidget(widget)
    widget.show()
    assert not widget.draw_row.isVisible()
    widget.decision.setCurrentText("assigned")
    assert widget.draw_row.isVisible() and widget.draw_button.isEnabled()
    assert widget.draw_text.text() == "The group code is drawn from cohort 'shore'."
    widget.show_draw("G-K3", "Drawn at random: group code G-K3 (blocks-sha256-v1, seed 5, animal 1).")
    assert widget.group.currentData() == "G-K3" and "G-K3" in widget.draw_text.text()
    assert not (widget.group.isEnabled() or widget.decision.isEnabled() or widget.draw_button.isEnabled())
    widget.resize(900, 700)
    save(widget, "decision-dialog-drawn.png")


def test_a_draw_that_is_not_possible_says_why(qtbot):
    widget = DecisionDialog(DecisionView("cedar", "training", "no.", (), can_draw=False,
                                         draw_note="No random draw: the protocol in force names fewer than two groups."))
    qtbot.addWidget(widget)
    widget.decision.setCurrentText("assigned")
    assert not widget.draw_button.isEnabled() and "fewer than two groups" in widget.draw_text.text()
    widget.show_draw_refused("No draw: cedar is already assigned.")
    assert widget.draw_text.text() == "No draw: cedar is already assigned." and not widget.drawn


def test_text_from_the_store_is_plain(qtbot):
    widget = DecisionDialog(DecisionView("<b>x</b>", "<i>state</i>", "<a href='x'>reason</a>", (("a", "<b>1</b>"),)))
    qtbot.addWidget(widget)
    for label in widget.findChildren(QLabel):
        assert label.textFormat() == Qt.TextFormat.PlainText
    assert "<a href='x'>reason</a>" in labels(widget)


# --- decision dialog: UI -> model ------------------------------------------------------
def test_a_filled_dialog_emits_the_request(dialog, qtbot):
    dialog.decision.setCurrentText("excluded")
    dialog.reason.setText("lost weight; vet advised a pause")
    dialog.planned.setText("none")
    dialog.planned_date.setText("2026-03-09")
    dialog.corrects.setCurrentIndex(1)
    with qtbot.waitSignal(dialog.decided) as caught:
        assert dialog.try_accept()
    assert caught.args[0] == DecisionRequest("cedar", "excluded", None, "ana", "lost weight; vet advised a pause",
                                             "none", "2026-03-09", 3)


def test_the_draw_button_asks_for_a_draw_and_the_request_says_it_was_drawn(dialog, qtbot):
    dialog.decision.setCurrentText("assigned")
    with qtbot.waitSignal(dialog.draw_requested) as asked:
        dialog.draw_button.click()
    assert asked.args == ["cedar"]
    dialog.show_draw("late", "Drawn at random: group late.")
    dialog.reason.setText("plateau reached")
    with qtbot.waitSignal(dialog.decided) as caught:
        assert dialog.try_accept()
    assert caught.args[0] == DecisionRequest("cedar", "assigned", "late", "ana", "plateau reached", None, None, None,
                                             drawn=True)


def test_missing_fields_are_named_and_nothing_is_emitted(dialog, qtbot):
    dialog.operator.clear()
    dialog.decision.setCurrentText("assigned")
    dialog.planned_date.setText("next week")
    emitted = []
    dialog.decided.connect(emitted.append)
    assert not dialog.try_accept()
    problems = dialog.problem_line.text()
    assert "Decided by" in problems and "Reason" in problems and "Group" in problems and "Planned date" in problems
    assert emitted == []


# --- care window ------------------------------------------------------------------------
CARE = CareView(date(2026, 3, 2), (
    CareRow("heron", "warning", ("1.20", "1.00", "1.20", "0.00", "0.00", "21.3", "85.2", "10:40"),
            (("warning", "Weight 21.3 g is 85.2 % of baseline, below the 86 % warning level."),), ("fur dull",)),
    CareRow("wren", "", ("1.05", "1.00", "0.75", "0.30", "0.00", "24.0", "96.0", "15:10")),
), "Minimum 1 ml/day, due by 17:00 (advisory thresholds)")


@pytest.fixture
def panel(qtbot):
    widget = CarePanel(CARE, operator="ana")
    qtbot.addWidget(widget)
    widget.resize(1300, 700)
    return widget


def test_the_care_window_shows_each_animal_with_its_state_in_words(panel):
    table = panel.table
    assert table.rowCount() == 2
    assert [table.item(r, 0).text() for r in range(2)] == ["heron", "wren"]
    assert table.item(0, 1).text() == state_text("warning") == "▲ check"
    assert table.item(1, 1).text() == "● fine"
    headers = [table.horizontalHeaderItem(c).text() for c in range(table.columnCount())]
    assert "water (ml)" in headers and "weight (g)" in headers and "of baseline (%)" in headers
    assert table.item(0, 8).text() == "85.2"
    assert panel.caution.text() == CAUTION and "veterinarian" in CAUTION
    assert "85.2 % of baseline" in panel.detail.text() and "fur dull" in panel.detail.text()
    save(panel, "care-window.png")


def test_logging_a_weight_emits_an_entry_for_the_chosen_animal(panel, qtbot):
    panel.table.selectRow(1)
    panel.weight.setValue(21.3)
    with qtbot.waitSignal(panel.entry_logged) as caught:
        panel.buttons["weight"].click()
    assert caught.args[0] == CareEntry("wren", "weight", 21.3, "", "ana")
    panel.note.setText("drank well")
    with qtbot.waitSignal(panel.entry_logged) as caught:
        panel.buttons["note"].click()
    assert caught.args[0] == CareEntry("wren", "note", None, "drank well", "ana")


def test_an_incomplete_care_form_is_refused(panel):
    panel.by.clear()
    emitted = []
    panel.entry_logged.connect(emitted.append)
    assert panel.log("supplement") is None
    assert "By" in panel.problem.text() and "above 0 ml" in panel.problem.text() and emitted == []


def test_the_printable_sheet_is_a_page_with_ink(panel):
    image = sheet_image(CARE)
    assert (image.width(), image.height()) == (1754, 1240)    # A4 landscape at 150 dpi
    dark = sum(1 for x in range(0, 1754, 7) for y in range(0, 400, 7) if image.pixelColor(x, y).lightness() < 128)
    assert dark > 50
    SHOTS.mkdir(parents=True, exist_ok=True)
    image.save(str(SHOTS / "care-sheet.png"))


# --- decision history -------------------------------------------------------------------
def test_the_history_lists_entries_and_the_chain(qtbot):
    row = ("1", "2026-03-02T10:00:00+01:00", "excluded", "", "ana", "in window: early", "no (both kept)",
           "vet advised a pause", "", "")
    widget = DecisionHistory(HistoryView("heron", (row,), True, "Decision log intact: 1 entry, hash chain verified."))
    qtbot.addWidget(widget)
    assert widget.table.rowCount() == 1 and widget.table.item(0, 6).text() == "no (both kept)"
    assert widget.chain.text().startswith("✔ Decision log intact")
    broken = DecisionHistory(HistoryView("heron", (), False, "Decision log broken at entry 2 (hash): edited."))
    qtbot.addWidget(broken)
    assert broken.chain.text().startswith("✖") and not broken.empty.isHidden()
    save(widget, "decision-history.png")
