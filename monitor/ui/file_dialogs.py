"""The File menu's dialogs: which session files to import, and what to export into which folder.

Rule: a dialog only gathers a person's choice and emits it as a frozen record
(`ImportChoice`, `ExportChoice`); OK refuses an incomplete choice with the
reason in the dialog. The work itself (the same as `rigside import` and
`rigside export`) runs in the app as a job with progress and Cancel.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

from PySide6.QtCore import Signal
from PySide6.QtWidgets import QComboBox, QFileDialog, QHBoxLayout, QLineEdit, QPushButton, QWidget

from monitor.ui.dialogs import RecordDialog, plain_label

EXPORT_KINDS = {  # what the person reads -> the export's own name
    "Events, one row per event (CSV)": "events",
    "Trials, one row per trial (CSV)": "trials",
    "NWB files, one per session": "nwb",
}


@dataclass(frozen=True)
class ImportChoice:
    files: tuple[Path, ...]
    protocol: Path


@dataclass(frozen=True)
class ExportChoice:
    kind: str          # events | trials | nwb
    folder: Path


def protocol_beside(session_file: Path) -> Path | None:
    """The protocol file beside a session file `NAME_sNN.ext`: `NAME.protocol.toml`, else the folder's only
    `.toml` file, else None."""
    folder = session_file.parent
    named = folder / f"{session_file.stem.rsplit('_s', 1)[0]}.protocol.toml"
    if named.is_file():
        return named
    tomls = sorted(folder.glob("*.toml"))
    return tomls[0] if len(tomls) == 1 else None


def _with_button(field: QWidget, button: QPushButton) -> QWidget:
    row = QWidget()
    layout = QHBoxLayout(row)
    layout.setContentsMargins(0, 0, 0, 0)
    layout.addWidget(field, 1)
    layout.addWidget(button)
    return row


class ImportDialog(RecordDialog):
    """Session files recorded elsewhere, and the training protocol they were recorded under."""

    chosen = Signal(object)   # ImportChoice

    def __init__(self, parent: QWidget | None = None) -> None:
        super().__init__("Import session files", parent)
        self.files: list[Path] = []
        self.files_line = plain_label("No files chosen.")
        self.protocol = QLineEdit()
        self.protocol.setPlaceholderText("the protocol file (.toml) in force when they were recorded")
        choose_files = QPushButton("Choose files…")
        choose_files.clicked.connect(self._choose_files)
        choose_protocol = QPushButton("Choose…")
        choose_protocol.clicked.connect(self._choose_protocol)
        self.add_row("Session files", _with_button(self.files_line, choose_files))
        self.add_row("Protocol", _with_button(self.protocol, choose_protocol))
        self.body.insertWidget(1, plain_label(
            "Each file is stored whole or not at all; files already imported are skipped. "
            "Cancel stops after the file being stored."))
        self.buttons.button(self.buttons.StandardButton.Ok).setText("Import")

    def set_files(self, files: list[Path]) -> None:
        self.files = list(files)
        shown = ", ".join(p.name for p in self.files[:3]) + (f" and {len(self.files) - 3} more"
                                                             if len(self.files) > 3 else "")
        self.files_line.setText(f"{len(self.files)} files: {shown}" if self.files else "No files chosen.")

    def _choose_files(self) -> None:
        names, _ = QFileDialog.getOpenFileNames(self, "Session files to import", "",
                                                "Session files (*.rsw *.txt *.csv *.log);;All files (*)")
        if names:
            self.set_files([Path(n) for n in names])
            if not self.protocol.text():
                self.protocol.setText(str(protocol_beside(Path(names[0])) or ""))

    def _choose_protocol(self) -> None:
        name, _ = QFileDialog.getOpenFileName(self, "Training protocol", "", "Protocol (*.toml);;All files (*)")
        if name:
            self.protocol.setText(name)

    def problems(self) -> list[str]:
        found = []
        if not self.files:
            found.append("Choose the session files to import.")
        if not self.protocol.text().strip():
            found.append("Choose the protocol file they were recorded under.")
        elif not Path(self.protocol.text().strip()).is_file():
            found.append(f"No protocol file at {self.protocol.text().strip()}.")
        return found

    def emit_record(self) -> None:
        self.chosen.emit(ImportChoice(tuple(self.files), Path(self.protocol.text().strip())))


class ExportDialog(RecordDialog):
    """What to export (events, trials, NWB) and the folder to write into."""

    chosen = Signal(object)   # ExportChoice

    def __init__(self, parent: QWidget | None = None) -> None:
        super().__init__("Export", parent)
        self.kind = QComboBox()
        self.kind.addItems(list(EXPORT_KINDS))
        self.folder = QLineEdit()
        self.folder.setPlaceholderText("the folder to write into")
        choose = QPushButton("Choose…")
        choose.clicked.connect(self._choose_folder)
        self.add_row("What", self.kind)
        self.add_row("Folder", _with_button(self.folder, choose))
        self.body.insertWidget(1, plain_label(
            "Files appear under their names only when complete; Cancel leaves no partial file."))
        self.buttons.button(self.buttons.StandardButton.Ok).setText("Export")

    def _choose_folder(self) -> None:
        name = QFileDialog.getExistingDirectory(self, "Export into")
        if name:
            self.folder.setText(name)

    def problems(self) -> list[str]:
        folder = self.folder.text().strip()
        if not folder:
            return ["Choose the folder to write into."]
        if not Path(folder).is_dir():
            return [f"No folder at {folder}."]
        return []

    def emit_record(self) -> None:
        self.chosen.emit(ExportChoice(EXPORT_KINDS[self.kind.currentText()], Path(self.folder.text().strip())))
