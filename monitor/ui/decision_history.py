"""The decision history of one animal: every logged entry, newest last, and whether the chain is intact.

Rule: a read-only table of the animal's entries in log order — entry number,
time, decision, group (or its code when blinded), who decided, the rule's
state at the time, whether the decision agreed with it, the reason, the plan
and the entry it corrects — and one line on the whole log's hash chain
(intact, or the first broken entry). A correction is a new entry; nothing
here edits the log. Text is plain; the view model is plain data from the app.
"""

from __future__ import annotations

from dataclasses import dataclass

from PySide6.QtWidgets import (
    QAbstractItemView,
    QDialog,
    QDialogButtonBox,
    QHeaderView,
    QTableWidget,
    QTableWidgetItem,
    QVBoxLayout,
    QWidget,
)

from monitor.ui.dialogs import plain_label
from monitor.ui.theme import ADVISORY

COLUMNS = ("entry", "time", "decision", "group", "by", "rule's verdict then", "agrees", "reason", "planned",
           "corrects")


@dataclass(frozen=True)
class HistoryView:
    """One animal's entries as text (built by the app), and the chain check in words."""

    animal: str
    rows: tuple[tuple[str, ...], ...]      # COLUMNS as text
    chain_ok: bool
    chain_text: str


class DecisionHistory(QDialog):
    """The logged decisions of one animal."""

    def __init__(self, view: HistoryView, parent: QWidget | None = None) -> None:
        super().__init__(parent)
        self.setWindowTitle(f"Decisions for {view.animal}")
        self.chain = plain_label(("✔ " if view.chain_ok else "✖ ") + view.chain_text)
        self.chain.setObjectName("chain")
        tint = "0, 158, 115" if view.chain_ok else "213, 94, 0"     # Okabe–Ito bluish green / vermillion
        self.chain.setStyleSheet(f"background: rgba({tint}, 45); color: palette(text); font-weight: bold; "
                                 "padding: 4px;")
        self.table = QTableWidget(len(view.rows), len(COLUMNS))
        self.table.setHorizontalHeaderLabels(list(COLUMNS))
        self.table.setEditTriggers(QAbstractItemView.EditTrigger.NoEditTriggers)
        self.table.verticalHeader().hide()
        header = self.table.horizontalHeader()
        header.setSectionResizeMode(QHeaderView.ResizeMode.ResizeToContents)
        header.setStretchLastSection(True)
        for r, row in enumerate(view.rows):
            for c, text in enumerate(row):
                self.table.setItem(r, c, QTableWidgetItem(text))
        self.empty = plain_label("No decision recorded for this animal yet.")
        self.empty.setVisible(not view.rows)
        buttons = QDialogButtonBox(QDialogButtonBox.StandardButton.Close)
        buttons.rejected.connect(self.reject)
        layout = QVBoxLayout(self)
        layout.addWidget(self.chain)
        layout.addWidget(self.empty)
        layout.addWidget(self.table, 1)
        layout.addWidget(plain_label("Entries are never edited: a correction is a new entry pointing at the old "
                                     "one. " + ADVISORY))
        layout.addWidget(buttons)
        self.resize(1200, 520)
