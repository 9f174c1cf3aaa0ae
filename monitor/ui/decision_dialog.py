"""The decision dialog: a person records what they decided about one animal, beside the rule's verdict.

Rule: the dialog shows, before anything is recorded, the caution that the
figures are advisory, the eligibility rule's own verdict with its reason, and
the frozen figures that will be stored with the entry. The person chooses the
decision, the group (only group codes when the study is blinded), who decides
and why, the planned manipulation and date, and optionally the earlier entry
this one corrects. With "assigned", *Draw the group at random* asks the app
for a draw (signal `draw_requested`); the drawn group (its code when blinded)
is shown and locked before anything is recorded, and the request then says
it was drawn. A line says, in words and a shape, whether the choice
agrees with the rule; a choice that differs is still recorded, with the
verdict beside it. OK emits a `DecisionRequest`; the app stores it. All text
is plain (never markup). The view model is plain data built by the app.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import date, datetime
from typing import Mapping

from PySide6.QtCore import Qt, Signal
from PySide6.QtWidgets import QComboBox, QGridLayout, QHBoxLayout, QLineEdit, QPushButton, QWidget

from monitor.ui.dialogs import RecordDialog, plain_label

DECISIONS = ("eligible", "assigned", "deferred", "excluded")
NO_GROUP = ""
CAUTION = ("Advisory: these figures and the rule's verdict are advisory. The approved animal-use protocol, the "
           "animal-care committee and the veterinarian decide. Follow local rules.")
AGREES = "✔ agrees with the rule's verdict"
DIFFERS = "▲ differs from the rule's verdict: your decision is recorded as decided, with the verdict beside it"
NO_RULE = "● no eligibility rule to compare with: the figures are recorded as they are"


@dataclass(frozen=True)
class DecisionView:
    """What the dialog shows about one animal at this moment (built by the app)."""

    animal: str
    rule_state: str
    rule_reason: str
    figures: tuple[tuple[str, str], ...]                    # (caption with unit, value) as they will be frozen
    groups: tuple[tuple[str, str], ...] = ()                # (value recorded, text shown): codes when blinded
    blinded: bool = False
    agrees: Mapping[tuple[str, str], bool] = field(default_factory=dict)  # (decision, group) -> rule supports it
    has_rule: bool = True
    earlier: tuple[tuple[int, str], ...] = ()               # (seq, one line) of this animal's entries
    operator: str = ""
    can_draw: bool = False                                  # a random draw can be offered for "assigned"
    draw_note: str = ""                                     # how the draw is made, or why it cannot be


@dataclass(frozen=True)
class DecisionRequest:
    """A person's decision as typed, for the app to record."""

    animal: str
    decision: str
    group: str | None                 # the group's name, or its code when blinded
    operator: str
    reason: str
    planned_manipulation: str | None
    planned_date: str | None
    corrects: int | None
    drawn: bool = False               # the group was drawn at random in the dialog


def _date_ok(text: str) -> bool:
    try:
        date.fromisoformat(text)
        return True
    except ValueError:
        pass
    try:
        return "T" in text and datetime.fromisoformat(text).tzinfo is not None
    except ValueError:
        return False


class DecisionDialog(RecordDialog):
    """Record eligible / assigned / deferred / excluded for one animal, with the figures frozen."""

    decided = Signal(object)   # DecisionRequest
    draw_requested = Signal(str)   # animal

    def __init__(self, view: DecisionView, parent: QWidget | None = None) -> None:
        super().__init__(f"Decision for {view.animal}", parent)
        self.view = view
        self.setMinimumWidth(860)
        self.caution = plain_label(CAUTION)
        self.caution.setObjectName("caution")
        self.caution.setStyleSheet("background: rgba(230, 159, 0, 70); color: palette(text); font-weight: bold; "
                                   "padding: 6px;")
        self.verdict = plain_label(f"Rule's verdict: {view.rule_state}")
        self.verdict.setObjectName("verdict")
        font = self.verdict.font()
        font.setPointSizeF(font.pointSizeF() * 1.3)
        font.setBold(True)
        self.verdict.setFont(font)
        self.reason_of_rule = plain_label(view.rule_reason)
        self.figures = QGridLayout()
        self.figures.setHorizontalSpacing(18)
        half = (len(view.figures) + 1) // 2
        for k, (caption, value) in enumerate(view.figures):
            column = 0 if k < half else 2
            value_label = plain_label(value)          # a long value (the model figure) wraps, never clips
            value_label.setObjectName("figure")
            bold = value_label.font()
            bold.setBold(True)
            value_label.setFont(bold)
            value_label.setMinimumWidth(value_label.fontMetrics().horizontalAdvance("reached at session 100"))
            self.figures.addWidget(plain_label(caption, wrap=True), k % half, column)   # a definition wraps
            self.figures.addWidget(value_label, k % half, column + 1)
        for column, stretch in enumerate((3, 2, 3, 2)):
            self.figures.setColumnStretch(column, stretch)
        self.decision = QComboBox()
        self.decision.addItems(list(DECISIONS))
        self.group = QComboBox()
        self.group.addItem("no group" if not view.blinded else "no group code", NO_GROUP)
        for value, shown in view.groups:
            self.group.addItem(shown, value)
        self.operator = QLineEdit(view.operator)
        self.reason = QLineEdit()
        self.reason.setPlaceholderText("why, in a sentence")
        self.planned = QLineEdit()
        self.planned.setPlaceholderText("e.g. muscimol, 0.5 µL per side")
        self.planned_date = QLineEdit()
        self.planned_date.setPlaceholderText("YYYY-MM-DD")
        self.corrects = QComboBox()
        self.corrects.addItem("nothing (a new decision)", None)
        for seq, line in view.earlier:
            self.corrects.addItem(f"entry {seq}: {line}", seq)
        self.drawn = False
        self.draw_button = QPushButton("Draw the group at random")
        self.draw_button.setEnabled(view.can_draw)
        self.draw_button.clicked.connect(lambda: self.draw_requested.emit(view.animal))
        self.draw_text = plain_label(view.draw_note)
        self.draw_text.setObjectName("draw")
        self.draw_row = QWidget()
        draw_layout = QHBoxLayout(self.draw_row)
        draw_layout.setContentsMargins(0, 0, 0, 0)
        draw_layout.addWidget(self.draw_button)
        draw_layout.addWidget(self.draw_text, 1)
        self.agreement = plain_label()
        self.agreement.setObjectName("agreement")
        self.decision.currentIndexChanged.connect(self._show_draw_row)
        self.decision.currentIndexChanged.connect(self._show_agreement)
        self.group.currentIndexChanged.connect(self._show_agreement)

        self.body.insertWidget(0, self.caution)
        self.body.insertWidget(1, self.verdict)
        self.body.insertWidget(2, self.reason_of_rule)
        self.body.insertWidget(3, plain_label("Figures recorded with this decision (frozen now):", wrap=False))
        self.body.insertLayout(4, self.figures)
        self.add_row("Decision", self.decision)
        self.add_row("Group code" if view.blinded else "Group", self.group)
        self.add_row("Random assignment", self.draw_row)
        self.add_row("Decided by", self.operator)
        self.add_row("Reason", self.reason)
        self.add_row("Planned manipulation", self.planned)
        self.add_row("Planned date", self.planned_date)
        self.add_row("Corrects", self.corrects)
        self.body.insertWidget(self.body.indexOf(self.problem_line), self.agreement)
        self.buttons.button(self.buttons.StandardButton.Ok).setText("Record decision")
        self._show_draw_row()
        self._show_agreement()

    def _show_draw_row(self) -> None:
        visible = self.decision.currentText() == "assigned"
        self.draw_row.setVisible(visible)
        self.form.labelForField(self.draw_row).setVisible(visible)

    def show_draw(self, group: str, text: str) -> None:
        """Show the drawn group (value as recorded) and lock the choice until the dialog closes."""
        index = self.group.findData(group)
        if index < 0:
            self.show_draw_refused(f"The draw gave {group!r}, which is not in the list: nothing was drawn.")
            return
        self.group.setCurrentIndex(index)
        self.drawn = True
        for widget in (self.group, self.decision, self.draw_button):
            widget.setEnabled(False)
        self.draw_text.setText(text)
        self.draw_text.setStyleSheet("background: rgba(86, 180, 233, 60); color: palette(text); "
                                     "font-weight: bold; padding: 4px;")  # Okabe–Ito sky blue

    def show_draw_refused(self, text: str) -> None:
        self.draw_text.setText(text)

    def _choice(self) -> tuple[str, str]:
        return self.decision.currentText(), self.group.currentData() or NO_GROUP

    def _show_agreement(self) -> None:
        if not self.view.has_rule:
            self.agreement.setText(NO_RULE)
            return
        agrees = self.view.agrees.get(self._choice())
        self.agreement.setText(AGREES if agrees else DIFFERS)
        tint = "0, 158, 115" if agrees else "213, 94, 0"      # Okabe–Ito bluish green / vermillion
        self.agreement.setStyleSheet(f"background: rgba({tint}, 45); color: palette(text); font-weight: bold; "
                                     "padding: 4px;")
        self.agreement.setAlignment(Qt.AlignmentFlag.AlignLeft)

    def problems(self) -> list[str]:
        problems = []
        if not self.operator.text().strip():
            problems.append("Decided by: type the name of who decides.")
        if not self.reason.text().strip():
            problems.append("Reason: say why, in a sentence.")
        if self.decision.currentText() == "assigned" and not self.group.currentData():
            problems.append("Group: an assignment names a group" + (" code." if self.view.blinded else "."))
        when = self.planned_date.text().strip()
        if when and not _date_ok(when):
            problems.append("Planned date: write it as YYYY-MM-DD (or a date-time with its UTC offset).")
        return problems

    def emit_record(self) -> None:
        decision, group = self._choice()
        self.decided.emit(DecisionRequest(
            self.view.animal, decision, group or None, self.operator.text().strip(), self.reason.text().strip(),
            self.planned.text().strip() or None, self.planned_date.text().strip() or None,
            self.corrects.currentData(), self.drawn))
