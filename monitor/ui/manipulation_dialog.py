"""The dialog that records a manipulation from the animal page.

Rule: the person says what was done (acute: one test session; lasting: every
session from the first affected on), whether it is a control (vehicle, sham),
which session it affected first and, for an acute test, its control session;
who and why. The group is taken from the animal's assignment unless named
(a code in a blinded cohort). OK refuses missing or contradictory fields with
a line per problem; a valid form emits a `ManipulationRequest` and the app
stores it. The figures that follow are advisory.
"""

from __future__ import annotations

from typing import NamedTuple

from PySide6.QtCore import Signal
from PySide6.QtWidgets import QCheckBox, QComboBox, QLineEdit, QWidget

from monitor.ui.dialogs import RecordDialog, plain_label
from monitor.ui.theme import ADVISORY

NO_CONTROL = "none"


class ManipulationRequest(NamedTuple):
    """What the form says; sessions are report indexes (from 1)."""

    animal: str
    duration: str  # acute | lasting
    role: str  # test | control
    what: str
    session: int
    control_session: int | None
    group: str | None
    operator: str
    reason: str


class ManipulationDialog(RecordDialog):
    """Record a manipulation of one animal."""

    submitted = Signal(object)  # ManipulationRequest

    def __init__(self, animal: str, sessions: list[tuple[int, str]], operator: str = "",
                 parent: QWidget | None = None) -> None:
        super().__init__(f"Record a manipulation — {animal}", parent)
        self.animal = animal
        self.duration = QComboBox()
        self.duration.addItems(["acute (one test session)", "lasting (every session from then on)"])
        self.control = QCheckBox("control: vehicle or sham, should remove nothing")
        self.what = QLineEdit()
        self.what.setPlaceholderText("e.g. muscimol M1 0.5 µl, saline, lesion")
        self.session = QComboBox()
        self.control_session = QComboBox()
        self.control_session.addItem(NO_CONTROL, None)
        for index, text in sessions:
            self.session.addItem(text, index)
            self.control_session.addItem(text, index)
        self.session.setCurrentIndex(self.session.count() - 1)
        self.group = QLineEdit()
        self.group.setPlaceholderText("from the animal's assignment")
        self.operator = QLineEdit(operator)
        self.reason = QLineEdit()
        for caption, field in (("Kind", self.duration), ("", self.control), ("What", self.what),
                               ("First affected session", self.session), ("Its control session", self.control_session),
                               ("Group (code when blinded)", self.group), ("Operator", self.operator),
                               ("Reason", self.reason)):
            self.add_row(caption, field)
        self.body.insertWidget(2, plain_label("The stage at the last session before it is frozen in the record. "
                                              + ADVISORY))

    def request(self) -> ManipulationRequest:
        return ManipulationRequest(self.animal, "acute" if self.duration.currentIndex() == 0 else "lasting",
                                   "control" if self.control.isChecked() else "test", self.what.text().strip(),
                                   self.session.currentData(), self.control_session.currentData(),
                                   self.group.text().strip() or None, self.operator.text().strip(),
                                   self.reason.text().strip())

    def problems(self) -> list[str]:
        r = self.request()
        found = []
        if r.session is None:
            found.append("First affected session: the animal has no session yet.")
        if not r.what:
            found.append("What: name what was done (e.g. muscimol M1, saline, lesion).")
        if r.control_session is not None and (r.duration != "acute" or r.role != "test"):
            found.append("Its control session: only an acute test names a control session.")
        if r.control_session is not None and r.control_session == r.session:
            found.append("Its control session: choose another session than the test.")
        if not r.operator:
            found.append("Operator: who records it.")
        if not r.reason:
            found.append("Reason: why, in a sentence.")
        return found

    def emit_record(self) -> None:
        self.submitted.emit(self.request())
