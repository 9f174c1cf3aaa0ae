"""Dialogs for a person's records: check-in / check-out, condition records, exclusions.

Rule: a dialog collects plain values, runs the pure checks of
`monitor.ui.validation`, shows every problem in one plain-text line and stays
open until there are none; on acceptance it emits one signal carrying a frozen
record (CheckIn, ConditionRecord, Exclusion) and the app stores it. Dialogs
never store anything themselves. Figures about care are marked advisory.
"""

from __future__ import annotations

from PySide6.QtCore import Qt, Signal
from PySide6.QtWidgets import (
    QCheckBox,
    QComboBox,
    QDialog,
    QDialogButtonBox,
    QDoubleSpinBox,
    QFormLayout,
    QLabel,
    QLineEdit,
    QPushButton,
    QVBoxLayout,
    QWidget,
)

from monitor.ui.models import CheckIn, CheckOut, ConditionRecord, Exclusion, Roster, UnattendedGift
from monitor.ui.theme import ADVISORY
from monitor.ui.validation import (check_in_problems, condition_problems, exclusion_problems, gift_problems,
                                  unusual_box_warning)


def plain_label(text: str = "", wrap: bool = True) -> QLabel:
    """A QLabel that never interprets its text as markup."""
    label = QLabel()
    label.setTextFormat(Qt.TextFormat.PlainText)
    label.setWordWrap(wrap)
    label.setText(text)
    return label


class RecordDialog(QDialog):
    """OK runs `problems()`; shows them or accepts and calls `emit_record()`."""

    def __init__(self, title: str, parent: QWidget | None) -> None:
        super().__init__(parent)
        self.setWindowTitle(title)
        self.setMinimumWidth(520)
        self.form = QFormLayout()
        self.problem_line = plain_label()
        self.problem_line.setObjectName("problems")
        self.problem_line.setStyleSheet("background: rgba(213, 94, 0, 45); color: palette(text); "
                                        "font-weight: bold; padding: 4px;")
        self.problem_line.hide()
        self.buttons = QDialogButtonBox(QDialogButtonBox.StandardButton.Ok | QDialogButtonBox.StandardButton.Cancel)
        self.buttons.accepted.connect(self.try_accept)
        self.buttons.rejected.connect(self.reject)
        self.body = QVBoxLayout(self)
        self.body.addLayout(self.form)
        self.body.addWidget(self.problem_line)
        self.body.addWidget(self.buttons)

    def add_row(self, caption: str, field: QWidget) -> None:
        self.form.addRow(plain_label(caption, wrap=False), field)

    def problems(self) -> list[str]:
        raise NotImplementedError

    def emit_record(self) -> None:
        raise NotImplementedError

    def try_accept(self) -> bool:
        problems = self.problems()
        if problems:
            self.problem_line.setText("\n".join("✖ " + p for p in problems))
            self.problem_line.show()
            return False
        self.problem_line.hide()
        self.emit_record()
        self.accept()
        return True


class CheckInDialog(RecordDialog):
    """Which animal is in which box, who put it there, its weight and the stage."""

    checked_in = Signal(object)     # CheckIn
    checked_out = Signal(object)    # CheckOut (after the person confirmed it)
    new_animal = Signal(str)        # a name not in the list: open the animals window to add it

    def __init__(self, roster: Roster, rig: str | None = None, operator: str = "",
                 parent: QWidget | None = None) -> None:
        super().__init__("Check in an animal", parent)
        self.roster = roster
        self.animal = QComboBox()
        self.animal.setEditable(True)
        self.animal.addItems(list(roster.animals))
        self.rig = QComboBox()
        self.rig.addItems(list(roster.rigs))
        if rig:
            self.rig.setCurrentText(rig)
        self.operator = QComboBox()
        self.operator.setEditable(True)
        self.operator.addItems(list(roster.operators))
        self.operator.setCurrentText(operator)
        self.weight = QDoubleSpinBox()
        self.weight.setRange(0.0, 2000.0)
        self.weight.setDecimals(1)
        self.weight.setSuffix(" g")
        self.weight.setSpecialValueText("not weighed")
        self.stage = QComboBox()
        self.stage.addItems(list(roster.stages))
        self.warning = plain_label()
        self.warning.setObjectName("unusual_box")
        self.warning.setStyleSheet("background: rgba(230, 159, 0, 70); color: palette(text); "
                                   "font-weight: bold; padding: 4px;")
        self.occupant = plain_label()
        self.check_out_button = QPushButton("Check out the animal in this box…")
        self._confirming = False
        self.check_out_button.clicked.connect(self.check_out)
        self.new_animal_button = QPushButton("Add as a new animal…")
        self.new_animal_button.clicked.connect(self._add_new_animal)
        self.add_row("Box", self.rig)
        self.form.addRow(self.occupant)
        self.add_row("Animal", self.animal)
        self.form.addRow(self.new_animal_button)
        self.add_row("Operator", self.operator)
        self.add_row("Weight", self.weight)
        self.add_row("Stage", self.stage)
        self.body.insertWidget(1, self.warning)
        self.body.insertWidget(2, plain_label(ADVISORY))
        self.body.insertWidget(3, self.check_out_button)
        self.animal.currentTextChanged.connect(self._refresh)
        self.rig.currentTextChanged.connect(self._refresh)
        self.animal.currentTextChanged.connect(self._default_stage)
        self.rig.currentTextChanged.connect(self._default_stage)
        if rig and rig in roster.occupied:
            self.animal.setCurrentText(roster.occupied[rig])
        self._refresh()
        self._default_stage()

    def _default_stage(self) -> None:
        """The box's own stage, else the animal's current stage, else the protocol's first stage."""
        self.stage.setCurrentText(self.roster.default_stage(self.animal.currentText(), self.rig.currentText()))

    def _refresh(self) -> None:
        rig = self.rig.currentText()
        text = unusual_box_warning(self.roster, self.animal.currentText(), rig)
        self.warning.setText("▲ " + text if text else "")
        self.warning.setVisible(bool(text))
        occupant = self.roster.occupied.get(rig)
        self.occupant.setText(f"{occupant} is checked in here." if occupant else "This box is free.")
        self.check_out_button.setEnabled(occupant is not None)
        self._confirming = False
        self.check_out_button.setText("Check out the animal in this box…")
        name = self.animal.currentText().strip()
        self.new_animal_button.setVisible(bool(name) and name not in self.roster.animals)

    def _add_new_animal(self) -> None:
        """Close, and ask for the animals window with the typed name (check in again once it is added)."""
        name = self.animal.currentText().strip()
        self.reject()
        self.new_animal.emit(name)

    def problems(self) -> list[str]:
        return check_in_problems(self.roster, self.animal.currentText(), self.rig.currentText(),
                                 self.operator.currentText(), self.weight.value(), self.stage.currentText())

    def emit_record(self) -> None:
        self.checked_in.emit(CheckIn(animal=self.animal.currentText().strip(), rig=self.rig.currentText(),
                                     operator=self.operator.currentText().strip(), weight_g=self.weight.value(),
                                     stage=self.stage.currentText()))

    def check_out(self) -> bool:
        """First press: ask to confirm (and for the operator); second press: emit the check-out."""
        rig = self.rig.currentText()
        animal = self.roster.occupied.get(rig)
        if animal is None:
            return False
        if not self.operator.currentText().strip():
            self.problem_line.setText("✖ Operator: type your name to check the animal out.")
            self.problem_line.show()
            self.operator.setFocus()
            return False
        if not self._confirming:
            self._confirming = True
            self.check_out_button.setText(f"Confirm: check {animal} out of {rig} now")
            self.problem_line.setText(f"▲ The session of {animal} in {rig} ends when you confirm.")
            self.problem_line.show()
            return False
        self.checked_out.emit(CheckOut(rig, animal, self.operator.currentText().strip()))
        self.accept()
        return True


class ConditionDialog(RecordDialog):
    """A condition or manipulation for one session: what, dose, volume, sham."""

    submitted = Signal(object)      # ConditionRecord

    def __init__(self, animal: str, session: int, parent: QWidget | None = None) -> None:
        super().__init__(f"Condition for {animal}, session {session}", parent)
        self.animal, self.session = animal, session
        self.what = QLineEdit()
        self.what.setPlaceholderText("e.g. muscimol, saline, lesion")
        self.dose = QLineEdit()
        self.dose.setPlaceholderText("e.g. 0.5 mg/kg")
        self.volume = QDoubleSpinBox()
        self.volume.setRange(-1.0, 10000.0)
        self.volume.setDecimals(2)
        self.volume.setValue(-1.0)
        self.volume.setSuffix(" µL")
        self.volume.setSpecialValueText("not given")
        self.sham = QCheckBox("sham (control procedure, nothing delivered)")
        self.note = QLineEdit()
        self.add_row("What", self.what)
        self.add_row("Dose", self.dose)
        self.add_row("Volume", self.volume)
        self.form.addRow(self.sham)
        self.add_row("Note", self.note)

    def _volume(self) -> float | None:
        return None if self.volume.value() < 0 else self.volume.value()

    def problems(self) -> list[str]:
        return condition_problems(self.what.text(), self.dose.text(), self._volume())

    def emit_record(self) -> None:
        self.submitted.emit(ConditionRecord(animal=self.animal, session=self.session, what=self.what.text().strip(),
                                            dose=self.dose.text().strip(), volume_ul=self._volume(),
                                            sham=self.sham.isChecked(), note=self.note.text().strip()))


class ExclusionDialog(RecordDialog):
    """Keep one session out of curves and fits, or count it again (`undo`); a reason is required either way."""

    submitted = Signal(object)      # Exclusion

    def __init__(self, animal: str, session: int, parent: QWidget | None = None, undo: bool = False) -> None:
        super().__init__(f"Count {animal}'s session {session} again" if undo else
                         f"Exclude {animal}, session {session}", parent)
        self.animal, self.session, self.undo = animal, session, undo
        self.reason = QLineEdit()
        self.reason.setPlaceholderText("e.g. the cable was fine after all" if undo else "e.g. lever stuck for 20 min")
        self.add_row("Reason", self.reason)
        self.body.insertWidget(1, plain_label(
            "The session goes back into the learning curve, the plateau rule and the model fits; the exclusion "
            "and its undoing both stay in the log." if undo else
            "The session stays in the store and in the table; it is kept out of the learning curve, the plateau "
            "rule and the model fits."))

    def problems(self) -> list[str]:
        return exclusion_problems(self.reason.text(), self.undo)

    def emit_record(self) -> None:
        self.submitted.emit(Exclusion(animal=self.animal, session=self.session, reason=self.reason.text().strip(),
                                      excluded=not self.undo))


class GiveDialog(RecordDialog):
    """Give the presses a box sent while nobody was checked in to the animal that was in it."""

    given = Signal(object)          # UnattendedGift

    def __init__(self, roster: Roster, presses: dict[str, int], rig: str | None = None, operator: str = "",
                 parent: QWidget | None = None) -> None:
        super().__init__("Give unattended trials to an animal", parent)
        self.presses = presses
        self.rig = QComboBox()
        self.rig.addItems([r for r in roster.rigs if presses.get(r)])
        if rig and presses.get(rig):
            self.rig.setCurrentText(rig)
        self.animal = QComboBox()
        self.animal.setEditable(True)
        self.animal.addItems(list(roster.animals))
        self.animal.setCurrentText("")
        self.operator = QLineEdit(operator)
        self.reason = QLineEdit()
        self.reason.setPlaceholderText("e.g. checked in late: wren was in the box from 09:05")
        self.count = plain_label()
        self.add_row("Box", self.rig)
        self.form.addRow(self.count)
        self.add_row("Animal", self.animal)
        self.add_row("Operator", self.operator)
        self.add_row("Reason", self.reason)
        self.body.insertWidget(1, plain_label("The box's run with nobody checked in is closed and becomes a session "
                                              "of this animal; the change is logged with your name and reason."))
        self.rig.currentTextChanged.connect(self._refresh)
        self._refresh()

    def _refresh(self) -> None:
        n = self.presses.get(self.rig.currentText(), 0)
        self.count.setText(f"{n} presses or trials kept from this box." if n else
                           "No box has run with nobody checked in.")

    def problems(self) -> list[str]:
        return gift_problems(self.rig.currentText(), self.presses.get(self.rig.currentText(), 0),
                             self.animal.currentText(), self.operator.text(), self.reason.text())

    def emit_record(self) -> None:
        self.given.emit(UnattendedGift(self.rig.currentText(), self.animal.currentText().strip(),
                                       self.operator.text().strip(), self.reason.text().strip()))
