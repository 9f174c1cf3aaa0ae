"""The animals window: subject records listed, added, edited and retired, with each animal's change log.

Rule: the window shows plain records (dicts of the subject fields, `missing`,
`retired_at`) and change lines given to it, and asks for changes through
signals (`save_requested` with an AnimalEdit, `retire_requested`); it never
reads or writes the store itself. The app answers with fresh records or a
one-sentence error that the window shows in place. Only fields that differ
from the selected record are sent as an edit; an empty field clears it.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

from PySide6.QtCore import Qt, Signal
from PySide6.QtWidgets import (QAbstractItemView, QComboBox, QDialog, QFormLayout, QHBoxLayout, QInputDialog,
                               QLabel, QLineEdit, QListWidget, QPushButton, QTableWidget, QTableWidgetItem,
                               QVBoxLayout, QWidget)

# field -> caption, in form order (the subject fields of the store's animal records)
FIELDS = (("lab_id", "Lab id"), ("cohort", "Cohort"), ("species", "Species"), ("sex", "Sex"),
          ("date_of_birth", "Date of birth"), ("age_days", "Age today (days)"), ("strain", "Strain"),
          ("genotype", "Genotype"), ("supplier", "Supplier"), ("baseline_weight_g", "Baseline weight (g)"),
          ("baseline_weight_date", "Baseline weighed on"), ("notes", "Notes"))
SEX_WORDS = (("", "not recorded"), ("F", "F – female"), ("M", "M – male"), ("U", "U – unknown"), ("O", "O – other"))
COLUMNS = ("Animal", "Lab id", "Species", "Sex", "Born", "Strain", "Genotype", "Sessions", "Record")
_NUMBERS = {"age_days": int, "baseline_weight_g": float}


@dataclass(frozen=True)
class AnimalEdit:
    """A request to add an animal (`new`) or change the given fields of one."""

    name: str
    new: bool
    operator: str
    fields: dict[str, Any] = field(default_factory=dict)


def record_state(record: dict[str, Any]) -> str:
    """The record column's words: retired, complete, or what a data file still lacks."""
    if record.get("retired_at"):
        return f"retired {str(record['retired_at'])[:10]}"
    missing = record.get("missing") or []
    return "complete" if not missing else "lacks " + ", ".join(missing)


class AnimalRecordsWindow(QDialog):
    """List on the left; the selected (or new) animal's record and its change log on the right."""

    save_requested = Signal(object)        # AnimalEdit
    retire_requested = Signal(str, str, str)  # animal, reason, operator
    selected = Signal(str)                 # animal: the app sends its change lines

    def __init__(self, operator: str = "", parent: QWidget | None = None) -> None:
        super().__init__(parent)
        self.setWindowTitle("Animal records")
        self.records: dict[str, dict[str, Any]] = {}
        self.table = QTableWidget(0, len(COLUMNS))
        self.table.setHorizontalHeaderLabels(COLUMNS)
        self.table.setSelectionBehavior(QAbstractItemView.SelectionBehavior.SelectRows)
        self.table.setSelectionMode(QAbstractItemView.SelectionMode.SingleSelection)
        self.table.setEditTriggers(QAbstractItemView.EditTrigger.NoEditTriggers)
        self.table.verticalHeader().hide()
        self.table.itemSelectionChanged.connect(self._picked)
        self.name = QLineEdit()
        self.inputs: dict[str, QLineEdit | QComboBox] = {}
        form = QFormLayout()
        form.addRow("Animal", self.name)
        for key, caption in FIELDS:
            if key == "sex":
                box = QComboBox()
                for code, words in SEX_WORDS:
                    box.addItem(words, code)
                self.inputs[key] = box
            elif key == "species":
                box = QComboBox()
                box.setEditable(True)
                box.addItems(["", "Rattus norvegicus", "Mus musculus"])
                self.inputs[key] = box
            else:
                line = QLineEdit()
                if key.endswith("date") or key == "date_of_birth":
                    line.setPlaceholderText("YYYY-MM-DD")
                self.inputs[key] = line
            form.addRow(caption, self.inputs[key])
        self.operator = QLineEdit(operator)
        self.operator.setPlaceholderText("your name (logged with every change)")
        form.addRow("Changed by", self.operator)
        self.error = QLabel()
        self.error.setObjectName("record_error")
        self.error.setWordWrap(True)
        self.error.setStyleSheet("color: palette(text); background: rgba(213, 94, 0, 60); padding: 4px;")
        self.error.hide()
        self.new_button = QPushButton("New animal")
        self.save_button = QPushButton("Save")
        self.retire_button = QPushButton("Retire…")
        self.new_button.clicked.connect(lambda: self.start_new(""))
        self.save_button.clicked.connect(self.save)
        self.retire_button.clicked.connect(self._retire)
        buttons = QHBoxLayout()
        for button in (self.new_button, self.save_button, self.retire_button):
            buttons.addWidget(button)
        self.history = QListWidget()
        right = QVBoxLayout()
        right.addLayout(form)
        right.addWidget(self.error)
        right.addLayout(buttons)
        right.addWidget(QLabel("Changes to this record (who, when, old → new):"))
        right.addWidget(self.history)
        layout = QHBoxLayout(self)
        layout.addWidget(self.table, 3)
        layout.addLayout(right, 2)
        self._new = True
        self.resize(1200, 640)

    # --- fed by the app ------------------------------------------------------------------------
    def set_records(self, records: list[dict[str, Any]], select: str | None = None) -> None:
        self.records = {r["name"]: r for r in records}
        self.table.setRowCount(len(records))
        for row, r in enumerate(records):
            born = r.get("date_of_birth") or (f"{r['age_days']} d on {r.get('age_date')}"
                                              if r.get("age_days") is not None else "")
            cells = (r["name"], r.get("lab_id"), r.get("species"), r.get("sex"), born, r.get("strain"),
                     r.get("genotype"), r.get("sessions", 0), record_state(r))
            for col, value in enumerate(cells):
                item = QTableWidgetItem("" if value is None else str(value))
                item.setToolTip(item.text())
                if col == len(cells) - 1 and r.get("missing") and not r.get("retired_at"):
                    item.setText("▲ " + item.text())
                self.table.setItem(row, col, item)
        self.table.resizeColumnsToContents()
        self.table.horizontalHeader().setStretchLastSection(True)
        if select in self.records:
            self.table.selectRow(list(self.records).index(select))

    def set_history(self, lines: list[str]) -> None:
        self.history.clear()
        self.history.addItems(lines)

    def show_error(self, text: str) -> None:
        self.error.setText(text)
        self.error.setVisible(bool(text))

    # --- the form ------------------------------------------------------------------------------
    def start_new(self, name: str) -> None:
        """An empty form for a new animal (the name filled in when known)."""
        self.table.clearSelection()
        self._new = True
        self.name.setReadOnly(False)
        self.name.setText(name)
        self._fill({})
        self.history.clear()
        self.show_error("")
        self.retire_button.setEnabled(False)
        self.save_button.setText("Add animal")

    def _picked(self) -> None:
        rows = self.table.selectionModel().selectedRows()
        if not rows:
            return
        record = self.records.get(self.table.item(rows[0].row(), 0).text())
        if record is None:
            return
        self._new = False
        self.name.setText(record["name"])
        self.name.setReadOnly(True)
        self._fill(record)
        self.show_error("")
        self.retire_button.setEnabled(not record.get("retired_at"))
        self.save_button.setText("Save changes")
        self.selected.emit(record["name"])

    def _fill(self, record: dict[str, Any]) -> None:
        for key, widget in self.inputs.items():
            value = record.get(key)
            text = "" if value is None else (f"{value:g}" if isinstance(value, float) else str(value))
            if key == "sex":
                widget.setCurrentIndex(max(0, widget.findData(text)))
            elif isinstance(widget, QComboBox):
                widget.setCurrentText(text)
            else:
                widget.setText(text)

    def values(self) -> dict[str, Any]:
        """The form's fields: text, numbers where numbers belong, '' for an empty field."""
        out: dict[str, Any] = {}
        for key, widget in self.inputs.items():
            if key == "sex":
                text = widget.currentData() or ""
            elif isinstance(widget, QComboBox):
                text = widget.currentText().strip()
            else:
                text = widget.text().strip()
            if text and key in _NUMBERS:
                try:
                    out[key] = _NUMBERS[key](text)
                except ValueError:
                    raise ValueError(f"{dict(FIELDS)[key]}: expected a number, got {text!r}") from None
            else:
                out[key] = text
        return out

    def save(self) -> None:
        name, operator = self.name.text().strip(), self.operator.text().strip()
        if not name:
            return self.show_error("Animal: type the animal's name.")
        if not operator:
            return self.show_error("Changed by: type your name; every change is logged with it.")
        try:
            values = self.values()
        except ValueError as exc:
            return self.show_error(str(exc))
        if self._new:
            fields = {k: v for k, v in values.items() if v != ""}
        else:
            old = self.records.get(name, {})
            fields = {k: v for k, v in values.items() if v != ("" if old.get(k) is None else old.get(k))}
            if not fields:
                return self.show_error("Nothing changed.")
        self.show_error("")
        self.save_requested.emit(AnimalEdit(name, self._new, operator, fields))

    def _retire(self) -> None:
        name, operator = self.name.text().strip(), self.operator.text().strip()
        if self._new or not name:
            return
        if not operator:
            return self.show_error("Changed by: type your name; every change is logged with it.")
        reason, ok = QInputDialog.getText(self, "Retire an animal", f"Why does {name} leave training?")
        if ok and reason.strip():
            self.retire_requested.emit(name, reason.strip(), operator)

    def keyPressEvent(self, event) -> None:  # noqa: N802 - Qt's name
        if event.key() in (Qt.Key.Key_Return, Qt.Key.Key_Enter):
            return  # Enter in a field must not close the window
        super().keyPressEvent(event)
