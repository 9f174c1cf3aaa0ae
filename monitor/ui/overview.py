"""The overview: one tile per rig on this PC, in a grid.

Rule: the panel subscribes to a RigBoard when built and disconnects when
closed; a changed rig updates only its own tile; the grid is about square
(columns = ceil(sqrt(n))), so 4 rigs give 2×2 and 16 give 4×4. Arrow keys move
between tiles; `focus_next` / `focus_previous` step through rigs in board order;
Enter or a click on a tile emits `open_requested(rig)`.
"""

from __future__ import annotations

import math

from PySide6.QtCore import Qt, Signal
from PySide6.QtGui import QCloseEvent, QKeyEvent
from PySide6.QtWidgets import QGridLayout, QLabel, QVBoxLayout, QWidget

from monitor.ui.owners import RigBoard
from monitor.ui.tile import RigTile


class OverviewPanel(QWidget):
    """A grid of RigTile, kept in step with a RigBoard."""

    open_requested = Signal(str)

    def __init__(self, board: RigBoard, parent: QWidget | None = None) -> None:
        super().__init__(parent)
        self._board = board
        self._tiles: dict[str, RigTile] = {}
        self._last_focus: str | None = None
        self._grid = QGridLayout()
        self._grid.setSpacing(8)
        self._empty = QLabel("No rigs yet. Add one with Rigs ▸ Add rig… (Ctrl+Shift+N).")
        self._empty.setTextFormat(Qt.TextFormat.PlainText)
        self._empty.setAlignment(Qt.AlignmentFlag.AlignCenter)
        layout = QVBoxLayout(self)
        layout.setContentsMargins(6, 6, 6, 6)
        layout.addWidget(self._empty)
        layout.addLayout(self._grid, 1)
        for rig in board.rigs():
            self._add_tile(rig)
        self._relayout()
        board.rig_added.connect(self._on_added)
        board.rig_changed.connect(self._on_changed)
        board.rig_removed.connect(self._on_removed)
        self._connected = True

    def tile(self, rig: str) -> RigTile | None:
        return self._tiles.get(rig)

    def tiles(self) -> list[RigTile]:
        return list(self._tiles.values())

    def current_rig(self) -> str | None:
        """The rig whose tile has (or last had) focus, else the first one."""
        for rig, tile in self._tiles.items():
            if tile.hasFocus():
                return rig
        if self._last_focus in self._tiles:
            return self._last_focus
        return next(iter(self._tiles), None)

    def focus_rig(self, rig: str) -> None:
        tile = self._tiles.get(rig)
        if tile is not None:
            self._last_focus = rig
            tile.setFocus(Qt.FocusReason.OtherFocusReason)

    def focus_next(self, step: int = 1) -> str | None:
        """Move focus `step` rigs on (wrapping); returns the rig now focused."""
        rigs = list(self._tiles)
        if not rigs:
            return None
        current = self.current_rig()
        index = (rigs.index(current) + step) % len(rigs) if current in rigs else 0
        self.focus_rig(rigs[index])
        return rigs[index]

    def disconnect_board(self) -> None:
        if self._connected:
            self._board.rig_added.disconnect(self._on_added)
            self._board.rig_changed.disconnect(self._on_changed)
            self._board.rig_removed.disconnect(self._on_removed)
            self._connected = False

    def closeEvent(self, event: QCloseEvent) -> None:
        self.disconnect_board()
        super().closeEvent(event)

    def keyPressEvent(self, event: QKeyEvent) -> None:
        cols = self._columns()
        moves = {Qt.Key.Key_Right: 1, Qt.Key.Key_Left: -1, Qt.Key.Key_Down: cols, Qt.Key.Key_Up: -cols}
        step = moves.get(Qt.Key(event.key()))
        if step is None:
            super().keyPressEvent(event)
            return
        self.focus_next(step)

    # --- board signals ---------------------------------------------------------
    def _on_added(self, rig: str) -> None:
        self._add_tile(rig)
        self._relayout()

    def _on_changed(self, rig: str) -> None:
        state = self._board.state(rig)
        tile = self._tiles.get(rig)
        if tile is None:
            self._on_added(rig)
        elif state is not None:
            tile.set_state(state)

    def _on_removed(self, rig: str) -> None:
        tile = self._tiles.pop(rig, None)
        if tile is not None:
            self._grid.removeWidget(tile)
            tile.deleteLater()
            self._relayout()

    def _add_tile(self, rig: str) -> None:
        state = self._board.state(rig)
        if state is None or rig in self._tiles:
            return
        tile = RigTile(state, self)
        tile.open_requested.connect(self.open_requested)
        tile.focused.connect(self._remember_focus)
        self._tiles[rig] = tile

    def _remember_focus(self, rig: str) -> None:
        self._last_focus = rig

    def _columns(self) -> int:
        return max(1, math.ceil(math.sqrt(len(self._tiles))))

    def _relayout(self) -> None:
        for tile in self._tiles.values():
            self._grid.removeWidget(tile)
        cols = self._columns()
        for i, tile in enumerate(self._tiles.values()):
            self._grid.addWidget(tile, i // cols, i % cols)
        rows = math.ceil(len(self._tiles) / cols) if self._tiles else 0
        for r in range(self._grid.rowCount()):
            self._grid.setRowStretch(r, 1 if r < rows else 0)
        for c in range(self._grid.columnCount()):
            self._grid.setColumnStretch(c, 1 if c < cols else 0)
        self._empty.setVisible(not self._tiles)
