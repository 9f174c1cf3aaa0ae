"""The cohort table: every animal in one sortable, printable view.

Rule: one row per animal with the figures the app computed elsewhere (stage,
sessions, plateau, consolidation status, the eligibility rule's verdict,
today's water against its minimum and the latest weight), as plain text with a
sort key per cell, so a click on a header sorts by the figure, not by its text.
"Save printable sheet" draws the table as an A4 landscape page (PNG) with the
advisory note. The table stores nothing and computes nothing.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import date

from PySide6.QtCore import QRectF, Qt, Signal
from PySide6.QtGui import QColor, QFont, QImage, QPainter
from PySide6.QtWidgets import (QAbstractItemView, QFileDialog, QHBoxLayout, QHeaderView, QPushButton, QTableWidget,
                               QTableWidgetItem, QVBoxLayout, QWidget)

from monitor.ui.dialogs import plain_label
from monitor.ui.theme import ADVISORY

COLUMNS = ("animal", "stage", "sessions", "plateau", "consolidation", "eligibility (rule's verdict)",
           "water today (ml)", "weight (g, % of baseline)")


@dataclass(frozen=True)
class CohortRow:
    """One animal: the text of each column and the key it sorts by (same order as COLUMNS)."""

    cells: tuple[str, ...]
    keys: tuple[object, ...]


@dataclass(frozen=True)
class CohortView:
    day: date
    rows: tuple[CohortRow, ...]


class _Item(QTableWidgetItem):
    """A cell that sorts by its key (numbers as numbers, missing figures last)."""

    def __init__(self, text: str, key: object) -> None:
        super().__init__(text)
        self.key = key

    def __lt__(self, other: QTableWidgetItem) -> bool:
        mine, theirs = self.key, getattr(other, "key", other.text())
        if mine is None or theirs is None:
            return theirs is None and mine is not None
        if isinstance(mine, (int, float)) and isinstance(theirs, (int, float)):
            return mine < theirs
        return str(mine) < str(theirs)


class CohortTable(QWidget):
    """The cohort's table with sorting and a printable page."""

    refresh_requested = Signal()

    def __init__(self, view: CohortView, parent: QWidget | None = None) -> None:
        super().__init__(parent, Qt.WindowType.Window)
        self.setWindowTitle("Cohort")
        self.resize(1200, 520)
        self.table = QTableWidget(0, len(COLUMNS))
        self.table.setHorizontalHeaderLabels(list(COLUMNS))
        self.table.setEditTriggers(QAbstractItemView.EditTrigger.NoEditTriggers)
        self.table.setSelectionBehavior(QAbstractItemView.SelectionBehavior.SelectRows)
        self.table.verticalHeader().hide()
        self.table.horizontalHeader().setSectionResizeMode(QHeaderView.ResizeMode.ResizeToContents)
        self.table.horizontalHeader().setStretchLastSection(True)
        self.table.setSortingEnabled(True)
        self._sort = (0, Qt.SortOrder.AscendingOrder)      # by animal until a header is clicked
        self.table.horizontalHeader().sortIndicatorChanged.connect(lambda c, o: setattr(self, "_sort", (c, o)))
        self.title = plain_label()
        self.print_button = QPushButton("Save printable sheet (PNG)…")
        self.print_button.clicked.connect(self.save_sheet)
        self.refresh_button = QPushButton("Refresh")
        self.refresh_button.clicked.connect(self.refresh_requested)
        buttons = QHBoxLayout()
        buttons.addWidget(self.title, 1)
        buttons.addWidget(self.refresh_button)
        buttons.addWidget(self.print_button)
        layout = QVBoxLayout(self)
        layout.addLayout(buttons)
        layout.addWidget(self.table, 1)
        layout.addWidget(plain_label("Click a column's header to sort by it. " + ADVISORY))
        self.view = view
        self.set_view(view)

    def set_view(self, view: CohortView) -> None:
        self.view = view
        self.title.setText(f"Every animal on {view.day.isoformat()}: {len(view.rows)} "
                           f"{'animal' if len(view.rows) == 1 else 'animals'}")
        column, order = self._sort
        self.table.setSortingEnabled(False)
        self.table.setRowCount(len(view.rows))
        for r, row in enumerate(view.rows):
            for c, (text, key) in enumerate(zip(row.cells, row.keys)):
                item = _Item(text, key)
                if isinstance(key, (int, float)):
                    item.setTextAlignment(Qt.AlignmentFlag.AlignRight | Qt.AlignmentFlag.AlignVCenter)
                self.table.setItem(r, c, item)
        self.table.setSortingEnabled(True)
        self.table.sortItems(column, order)

    def shown_rows(self) -> list[list[str]]:
        """The table's text as drawn (in its current order)."""
        return [[self.table.item(r, c).text() for c in range(len(COLUMNS))] for r in range(self.table.rowCount())]

    def save_sheet(self, path: str | None = None) -> str | None:
        if path is None:
            path, _ = QFileDialog.getSaveFileName(self, "Save printable cohort sheet",
                                                  f"cohort-{self.view.day.isoformat()}.png", "PNG image (*.png)")
        if not path:
            return None
        sheet_image(self.view.day, self.shown_rows()).save(path)
        return path


def sheet_image(day: date, rows: list[list[str]], width: int = 1754, height: int = 1240) -> QImage:
    """The cohort table as a printable page (A4 landscape at 150 dpi)."""
    image = QImage(width, height, QImage.Format.Format_RGB32)
    image.fill(QColor("white"))
    painter = QPainter(image)
    painter.setPen(QColor("black"))
    margin, y = 70, 70.0

    def text(x: float, top: float, w: float, h: float, s: str, size: float, bold: bool = False) -> None:
        font = QFont()
        font.setPixelSize(int(size))
        font.setBold(bold)
        painter.setFont(font)
        painter.drawText(QRectF(x, top, w, h), int(Qt.AlignmentFlag.AlignLeft | Qt.AlignmentFlag.AlignVCenter)
                         | int(Qt.TextFlag.TextWordWrap), s)

    usable = width - 2 * margin
    text(margin, y, usable, 50, f"Cohort, {day.isoformat()}", 40, True)
    y += 60
    text(margin, y, usable, 40, ADVISORY, 20)
    y += 50
    shares = (1.0, 1.0, 0.8, 1.4, 1.6, 2.2, 1.2, 1.4)
    widths = [usable * s / sum(shares) for s in shares]
    lefts = [margin + sum(widths[:k]) for k in range(len(widths))]
    for k, name in enumerate(COLUMNS):
        text(lefts[k], y, widths[k] - 8, 56, name, 20, True)
    y += 60
    painter.drawLine(margin, int(y), width - margin, int(y))
    step = min(58.0, (height - margin - y) / max(len(rows), 1))     # every animal on the page
    for row in rows:
        for k, cell in enumerate(row):
            text(lefts[k], y + 2, widths[k] - 8, step - 4, cell, min(20.0, step * 0.4), k == 0)
        y += step
    painter.end()
    return image
