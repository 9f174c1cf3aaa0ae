"""The lab database in the window: its state in the status bar, and a read-only view of the lab (every PC,
its rigs and animals, its last sync; an animal's pages open from here).

Rule: widgets show plain values handed to them and emit what a person asks
(save the URL, sync now, refresh); the app does the work in another process
and never blocks the screen. Text from the lab is shown as plain text. The
state is said in words (never colour alone): "lab: synced 10:42, 0 waiting",
"lab: unreachable since 09:10, 5321 waiting", "lab: syncing…", "lab: not set".
"""

from __future__ import annotations

from typing import Any, Sequence

from PySide6.QtCore import Qt, Signal
from PySide6.QtWidgets import (
    QDialog,
    QFormLayout,
    QHBoxLayout,
    QLineEdit,
    QPushButton,
    QTableWidget,
    QTableWidgetItem,
    QVBoxLayout,
    QWidget,
)

from monitor.ui.dialogs import plain_label

PC_COLUMNS = ("PC", "name", "last sync (UTC)", "rigs", "animals", "sessions")
ANIMAL_COLUMNS = ("animal", "lab id", "trained on")


class LabWindow(QDialog):
    """The lab's URL for this PC, a sync button, and what the lab holds (read-only)."""

    url_saved = Signal(str)
    sync_requested = Signal()
    refresh_requested = Signal()
    animal_requested = Signal(str)         # the lab's name of an animal: open its pages

    def __init__(self, url: str, parent: QWidget | None = None) -> None:
        super().__init__(parent)
        self.setWindowTitle("Lab database")
        self.resize(760, 680)
        self.url = QLineEdit(url)
        self.url.setPlaceholderText("postgresql://user@host/database")
        save = QPushButton("Save for this PC")
        save.clicked.connect(lambda: self.url_saved.emit(self.url.text().strip()))
        sync = QPushButton("Sync now")
        sync.clicked.connect(self.sync_requested.emit)
        refresh = QPushButton("Refresh")
        refresh.clicked.connect(self.refresh_requested.emit)
        row = QHBoxLayout()
        row.addWidget(self.url, 1)
        row.addWidget(save)
        form = QFormLayout()
        form.addRow("Lab URL", row)
        self.state = plain_label()
        self.state.setObjectName("lab_state")
        form.addRow("This PC", self.state)
        buttons = QHBoxLayout()
        buttons.addWidget(sync)
        buttons.addWidget(refresh)
        buttons.addStretch(1)
        self.pcs = _table(PC_COLUMNS)
        self.animals = _table(ANIMAL_COLUMNS)
        self.animals.setSelectionBehavior(QTableWidget.SelectionBehavior.SelectRows)
        self.animals.cellDoubleClicked.connect(lambda row, _col: self.open_animal(row))
        self.open_page = QPushButton("Open the animal's page")
        self.open_page.clicked.connect(lambda: self.open_animal(self.animals.currentRow()))
        pages = QHBoxLayout()
        pages.addWidget(plain_label("Double-click an animal for its pages as the rig PC shows them (history, "
                                    "learning curve, plateau, consolidation, decisions, care), read-only: "
                                    "nothing is recorded from the lab view."), 1)
        pages.addWidget(self.open_page)
        self.message = plain_label()
        layout = QVBoxLayout(self)
        layout.addLayout(form)
        layout.addLayout(buttons)
        layout.addWidget(plain_label("PCs feeding the lab (read-only)"))
        layout.addWidget(self.pcs, 1)
        layout.addWidget(plain_label("Animals in the lab (read-only)"))
        layout.addWidget(self.animals, 1)
        layout.addLayout(pages)
        layout.addWidget(self.message)

    def show_state(self, text: str) -> None:
        self.state.setText(text)

    def show_lab(self, document: dict[str, Any]) -> None:
        """Fill the tables from `rigside lab show --json`'s document."""
        _fill(self.pcs, [(pc["pc"], pc["name"], (pc["last_sync"] or "never").replace("T", " ")[:19], ", ".join(pc["rigs"]) or "-",
                          pc["animals"], pc["sessions"]) for pc in document.get("pcs", [])])
        _fill(self.animals, [(a["animal"], a["lab_id"] or "-", ", ".join(a["pcs"]))
                             for a in document.get("animals", [])])
        self.message.setText("")

    def open_animal(self, row: int) -> None:
        """Ask for the page of the animal in `row` (nothing without one)."""
        item = self.animals.item(row, 0) if row >= 0 else None
        if item is not None:
            self.animal_requested.emit(item.text())

    def show_message(self, text: str) -> None:
        self.message.setText(text)


def _table(columns: Sequence[str]) -> QTableWidget:
    table = QTableWidget(0, len(columns))
    table.setHorizontalHeaderLabels(list(columns))
    table.setEditTriggers(QTableWidget.EditTrigger.NoEditTriggers)
    table.horizontalHeader().setStretchLastSection(True)
    table.verticalHeader().setVisible(False)
    return table


def _fill(table: QTableWidget, rows: Sequence[Sequence[Any]]) -> None:
    table.setRowCount(len(rows))
    for r, row in enumerate(rows):
        for c, value in enumerate(row):
            item = QTableWidgetItem(str(value))
            item.setFlags(item.flags() & ~Qt.ItemFlag.ItemIsEditable)
            table.setItem(r, c, item)
    table.resizeColumnsToContents()
