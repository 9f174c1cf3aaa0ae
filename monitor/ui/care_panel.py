"""The care window: the cohort's water ledger for one day, forms to log care, and the printable sheet.

Rule: one row per animal for the chosen day — water total against the daily
minimum with its parts (earned in sessions, supplements), what is still
owed, the weight with its percent of baseline, the last fluid and the
day's care state as a word and a shape (never colour alone). Below, the
chosen animal's alerts and notes in full sentences, and forms to log a
weight, a supplement, a note or a baseline; each emits a `CareEntry` that
the app stores. The sheet is saved as CSV or as a printable PNG
(`sheet_image`), the caution printed on it. The caution (advisory; the
approved protocol, the animal-care committee and the veterinarian decide)
is always shown. Text is plain; the view model is plain data from the app.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import date

from PySide6.QtCore import QDate, QRectF, Qt, Signal
from PySide6.QtGui import QColor, QFont, QImage, QPainter
from PySide6.QtWidgets import (
    QAbstractItemView,
    QDateEdit,
    QDialog,
    QDoubleSpinBox,
    QFileDialog,
    QGridLayout,
    QHBoxLayout,
    QHeaderView,
    QLineEdit,
    QPushButton,
    QTableWidget,
    QTableWidgetItem,
    QVBoxLayout,
    QWidget,
)

from monitor.ui.dialogs import plain_label
from monitor.ui.theme import ADVISORY, colour

CAUTION = ADVISORY + " Follow local rules; an alert never replaces looking at the animal."
COLUMNS = ("animal", "state", "water (ml)", "minimum (ml)", "earned (ml)", "supplement (ml)", "owed (ml)",
           "weight (g)", "of baseline (%)", "last fluid")
# care level -> (word shown, symbol, Okabe–Ito colour); the worst level of the day names the row's state
LEVELS = {"alert": ("act now", "✖", "vermillion"), "warning": ("check", "▲", "orange"),
          "notice": ("to do", "○", "sky_blue"), "": ("fine", "●", "bluish_green")}


@dataclass(frozen=True)
class CareRow:
    """One animal's care day, as text (built by the app)."""

    animal: str
    level: str                        # "alert" | "warning" | "notice" | "" (nothing to do)
    cells: tuple[str, ...]            # COLUMNS[2:] as text
    alerts: tuple[tuple[str, str], ...] = ()   # (level, sentence)
    notes: tuple[str, ...] = ()
    state: str = ""                   # the day's own state when its figures cannot say more ("no record today")


@dataclass(frozen=True)
class CareView:
    """The cohort's care day."""

    day: date
    rows: tuple[CareRow, ...]
    thresholds: str                   # the thresholds in force, one line


@dataclass(frozen=True)
class CareEntry:
    """Something a person did for an animal's care, to be stored now."""

    animal: str
    kind: str                         # "weight" | "supplement" | "note" | "baseline"
    amount: float | None              # g for weight and baseline, ml for a supplement
    text: str
    by: str


def state_text(level: str, state: str = "") -> str:
    word, symbol, _ = LEVELS[level]
    return f"{symbol} {state or word}"


def _spin(suffix: str, decimals: int, top: float) -> QDoubleSpinBox:
    spin = QDoubleSpinBox()
    spin.setRange(0.0, top)
    spin.setDecimals(decimals)
    spin.setSuffix(suffix)
    return spin


class CarePanel(QDialog):
    """The day's water ledger for every animal, with care forms."""

    entry_logged = Signal(object)        # CareEntry
    day_changed = Signal(object)         # date
    export_requested = Signal(str, str)  # "csv" | "png", path

    def __init__(self, view: CareView, operator: str = "", parent: QWidget | None = None) -> None:
        super().__init__(parent)
        self.setWindowTitle("Care today")
        self.view = view
        self.caution = plain_label(CAUTION)
        self.caution.setObjectName("caution")
        self.caution.setStyleSheet("background: rgba(230, 159, 0, 70); color: palette(text); font-weight: bold; "
                                   "padding: 6px;")
        self.day = QDateEdit()
        self.day.setCalendarPopup(True)
        self.day.setDisplayFormat("yyyy-MM-dd")
        self.thresholds = plain_label()
        self.table = QTableWidget(0, len(COLUMNS))
        self.table.setHorizontalHeaderLabels(list(COLUMNS))
        self.table.setEditTriggers(QAbstractItemView.EditTrigger.NoEditTriggers)
        self.table.setSelectionBehavior(QAbstractItemView.SelectionBehavior.SelectRows)
        self.table.setSelectionMode(QAbstractItemView.SelectionMode.SingleSelection)
        self.table.verticalHeader().hide()
        self.table.horizontalHeader().setSectionResizeMode(QHeaderView.ResizeMode.ResizeToContents)
        self.table.horizontalHeader().setStretchLastSection(True)
        font = QFont(self.table.font())
        font.setPointSizeF(font.pointSizeF() * 1.25)
        self.table.setFont(font)
        self.detail = plain_label()
        self.detail.setObjectName("detail")
        self.by = QLineEdit(operator)
        self.by.setPlaceholderText("your name")
        self.weight = _spin(" g", 1, 2000.0)
        self.supplement = _spin(" ml", 2, 100.0)
        self.note = QLineEdit()
        self.note.setPlaceholderText("what you saw or did")
        self.baseline = _spin(" g", 1, 2000.0)
        self.buttons = {key: QPushButton(text) for key, text in (
            ("weight", "Log weight"), ("supplement", "Log supplement"), ("note", "Add note"),
            ("baseline", "Set baseline"), ("csv", "Save sheet as CSV…"), ("png", "Save printable sheet (PNG)…"))}
        self.problem = plain_label()
        self.problem.setObjectName("problems")
        self.problem.setStyleSheet("background: rgba(213, 94, 0, 45); color: palette(text); font-weight: bold; "
                                   "padding: 4px;")
        self.problem.hide()

        top = QHBoxLayout()
        top.addWidget(plain_label("Care day", wrap=False))
        top.addWidget(self.day)
        top.addWidget(self.thresholds, 1)
        forms = QGridLayout()
        forms.addWidget(plain_label("By", wrap=False), 0, 0)
        forms.addWidget(self.by, 0, 1)
        for row, (caption, field, key) in enumerate((("Body weight", self.weight, "weight"),
                                                     ("Supplement given", self.supplement, "supplement"),
                                                     ("Health note", self.note, "note"),
                                                     ("Baseline weight", self.baseline, "baseline")), start=1):
            forms.addWidget(plain_label(caption, wrap=False), row, 0)
            forms.addWidget(field, row, 1)
            forms.addWidget(self.buttons[key], row, 2)
            self.buttons[key].clicked.connect(lambda checked=False, k=key: self.log(k))
        forms.setColumnStretch(1, 1)
        lower = QHBoxLayout()
        lower.addWidget(self.detail, 3)
        lower.addLayout(forms, 2)
        exports = QHBoxLayout()
        exports.addStretch(1)
        for key in ("csv", "png"):
            exports.addWidget(self.buttons[key])
            self.buttons[key].clicked.connect(lambda checked=False, k=key: self._ask_export(k))
        layout = QVBoxLayout(self)
        layout.addWidget(self.caution)
        layout.addLayout(top)
        layout.addWidget(self.table, 1)
        layout.addLayout(lower)
        layout.addWidget(self.problem)
        layout.addLayout(exports)
        self.table.itemSelectionChanged.connect(self._show_detail)
        self.day.dateChanged.connect(lambda d: self.day_changed.emit(d.toPython()))
        self.resize(1300, 700)
        self.set_view(view)

    # --- model -> UI ---------------------------------------------------------------
    def set_view(self, view: CareView) -> None:
        chosen = self.selected_animal()
        self.view = view
        self.day.blockSignals(True)
        self.day.setDate(QDate(view.day.year, view.day.month, view.day.day))
        self.day.blockSignals(False)
        self.setWindowTitle(f"Care on {view.day.isoformat()}")
        self.thresholds.setText(view.thresholds)
        self.table.setRowCount(len(view.rows))
        for r, row in enumerate(view.rows):
            name = LEVELS[row.level][2]
            for c, text in enumerate((row.animal, state_text(row.level, row.state), *row.cells)):
                item = QTableWidgetItem(text)
                if c >= 2:
                    item.setTextAlignment(Qt.AlignmentFlag.AlignRight | Qt.AlignmentFlag.AlignVCenter)
                if c == 1:
                    tint = QColor(colour(name))
                    tint.setAlpha(90)
                    item.setBackground(tint)
                self.table.setItem(r, c, item)
        names = [row.animal for row in view.rows]
        self.table.selectRow(names.index(chosen) if chosen in names else 0)
        self._show_detail()

    def selected_animal(self) -> str | None:
        rows = self.table.selectionModel().selectedRows() if self.table.selectionModel() else []
        if not rows or rows[0].row() >= len(self.view.rows):
            return None
        return self.view.rows[rows[0].row()].animal

    def _show_detail(self) -> None:
        animal = self.selected_animal()
        row = next((r for r in self.view.rows if r.animal == animal), None)
        if row is None:
            self.detail.setText("No animal chosen.")
            return
        lines = [f"{row.animal} on {self.view.day.isoformat()}: {state_text(row.level, row.state)}"]
        lines += [f"{LEVELS[level][1]} {level}: {sentence}" for level, sentence in row.alerts] or ["No care alerts."]
        lines += [f"Note: {note}" for note in row.notes]
        self.detail.setText("\n".join(lines))
        for key in ("weight", "supplement", "note", "baseline"):
            self.buttons[key].setText(self.buttons[key].text().split(" for ")[0] + f" for {row.animal}")

    # --- UI -> model ---------------------------------------------------------------
    def log(self, kind: str) -> CareEntry | None:
        """Emit the entry typed in the `kind` form for the chosen animal, or show what is missing."""
        animal, by = self.selected_animal(), self.by.text().strip()
        amount = {"weight": self.weight.value(), "supplement": self.supplement.value(),
                  "baseline": self.baseline.value()}.get(kind)
        text = self.note.text().strip() if kind == "note" else ""
        problems = []
        if animal is None:
            problems.append("Choose an animal in the table.")
        if not by:
            problems.append("By: type your name.")
        if amount is not None and amount <= 0:
            unit = "ml" if kind == "supplement" else "g"
            problems.append(f"{kind.capitalize()}: enter an amount above 0 {unit}.")
        if kind == "note" and not text:
            problems.append("Health note: write what you saw or did.")
        if problems:
            self.problem.setText("\n".join("✖ " + p for p in problems))
            self.problem.show()
            return None
        self.problem.hide()
        entry = CareEntry(animal, kind, amount, text, by)
        if kind == "note":
            self.note.clear()
        else:
            {"weight": self.weight, "supplement": self.supplement, "baseline": self.baseline}[kind].setValue(0.0)
        self.entry_logged.emit(entry)
        return entry

    def _ask_export(self, kind: str) -> None:
        suffix = "csv" if kind == "csv" else "png"
        path, _ = QFileDialog.getSaveFileName(self, "Save the care sheet", f"care-{self.view.day}.{suffix}",
                                              f"{suffix.upper()} (*.{suffix})")
        if path:
            self.export_requested.emit(kind, path)


def sheet_image(view: CareView, width: int = 1754, height: int = 1240) -> QImage:
    """The care sheet as a printable page (A4 landscape at 150 dpi): title, caution, one row per animal."""
    image = QImage(width, height, QImage.Format.Format_RGB32)
    image.fill(QColor("white"))
    painter = QPainter(image)
    painter.setPen(QColor("black"))
    margin, y = 70, 70.0

    def text(x: float, top: float, w: float, h: float, s: str, size: float, bold: bool = False,
             flags=Qt.AlignmentFlag.AlignLeft | Qt.AlignmentFlag.AlignVCenter) -> None:
        font = QFont()
        font.setPixelSize(int(size))
        font.setBold(bold)
        painter.setFont(font)
        painter.drawText(QRectF(x, top, w, h), int(flags) | int(Qt.TextFlag.TextWordWrap), s)

    usable = width - 2 * margin
    text(margin, y, usable, 50, f"Care sheet, {view.day.isoformat()}", 40, True)
    y += 60
    text(margin, y, usable, 60, CAUTION, 22, True)
    y += 64
    text(margin, y, usable, 34, view.thresholds, 20)
    y += 50
    shares = (1.3, 1.2, 1.0, 1.0, 1.0, 1.1, 0.9, 1.0, 1.1, 1.6)
    widths = [usable * s / sum(shares) for s in shares]
    lefts = [margin + sum(widths[:k]) for k in range(len(widths))]
    for k, name in enumerate(COLUMNS):
        text(lefts[k], y, widths[k] - 8, 56, name, 20, True)
    y += 60
    painter.drawLine(margin, int(y), width - margin, int(y))
    for row in view.rows:
        cells = (row.animal, state_text(row.level, row.state), *row.cells)
        for k, cell in enumerate(cells):
            text(lefts[k], y + 4, widths[k] - 8, 36, cell, 22, k == 0)
        y += 42
        lines = [f"{LEVELS[level][1]} {level}: {sentence}" for level, sentence in row.alerts]
        lines += [f"note: {n}" for n in row.notes]
        for line in lines:
            text(lefts[1], y, usable - widths[0], 28, line, 18)
            y += 28
        y += 8
        painter.drawLine(margin, int(y), width - margin, int(y))
        if y > height - 120:
            break
    text(margin, height - 90, usable, 30, "Checked by: ______________________    Signature: ______________", 22)
    painter.end()
    return image
