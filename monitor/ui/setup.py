"""Adding a rig without editing files by hand.

Rule: the dialog offers the serial devices the app discovered (plain data:
description, USB serial number, path) or a log file path, an optional mapping
file, the valve calibration (µL per ms) and a protocol file; it checks them
with `validation.rig_setup_problems` and refuses, with a message saying what to
fix, until they are right. A serial rig is bound to its device's USB serial
number when it has one, so a re-plugged board is found again under a new name.
On acceptance it emits `rig_added(RigSetup)`; the app saves the settings.
"""

from __future__ import annotations

import os
from typing import Callable, Sequence

from PySide6.QtCore import Signal
from PySide6.QtWidgets import (
    QButtonGroup,
    QCheckBox,
    QComboBox,
    QDoubleSpinBox,
    QFileDialog,
    QHBoxLayout,
    QLineEdit,
    QPushButton,
    QRadioButton,
    QWidget,
)

from monitor.ui.dialogs import RecordDialog, plain_label
from monitor.ui.models import RigSetup, SerialDevice
from monitor.ui.validation import rig_setup_problems


def device_text(device: SerialDevice) -> str:
    """One line describing a discovered device (plain text)."""
    serial = f"serial no. {device.serial_number}" if device.serial_number else "no serial number"
    return f"{device.description or 'unknown device'} · {serial} · {device.path}"


class SetupDialog(RecordDialog):
    """Describe one new rig: name, source, mapping, valve calibration, protocol."""

    rig_added = Signal(object)      # RigSetup

    def __init__(self, devices: Sequence[SerialDevice], protocols: Sequence[str] = (),
                 existing: Sequence[str] = (), exists: Callable[[str], bool] = os.path.exists,
                 parent: QWidget | None = None) -> None:
        super().__init__("Add a rig", parent)
        self.setMinimumWidth(680)
        self.devices = list(devices)
        self.existing = set(existing)
        self.exists = exists
        self.name = QLineEdit()
        self.name.setPlaceholderText("e.g. box-05")
        self.use_serial = QRadioButton("serial device")
        self.use_file = QRadioButton("log file")
        group = QButtonGroup(self)
        group.addButton(self.use_serial)
        group.addButton(self.use_file)
        self.device = QComboBox()
        for device in self.devices:
            self.device.addItem(device_text(device))
        if not self.devices:
            self.device.addItem("no serial devices found")
            self.device.setEnabled(False)
        self.file_path = QLineEdit()
        self.mapping = QLineEdit()
        self.mapping.setPlaceholderText("optional: for rigs with their own line format")
        self.valve = QDoubleSpinBox()
        self.valve.setRange(0.0, 100.0)
        self.valve.setDecimals(3)
        self.valve.setSingleStep(0.01)
        self.valve.setSuffix(" µL/ms")
        self.valve.setSpecialValueText("not calibrated")
        self.reset = QCheckBox("the board restarts when the port opens (most Arduino-style boards)")
        self.reset.setChecked(True)
        self.protocol = QComboBox()
        self.protocol.setEditable(True)
        self.protocol.addItems(list(protocols))
        source = QHBoxLayout()
        source.addWidget(self.use_serial)
        source.addWidget(self.use_file)
        source.addStretch(1)
        self.add_row("Name", self.name)
        self.add_row("Source", source)
        self.add_row("Device", self.device)
        self.add_row("Restarts", self.reset)
        self.add_row("Log file", self._with_browse(self.file_path, "Choose the rig's log file"))
        self.add_row("Mapping", self._with_browse(self.mapping, "Choose a mapping file", "TOML (*.toml)"))
        self.add_row("Valve calibration", self.valve)
        self.add_row("Protocol", self._with_browse(self.protocol, "Choose a protocol file", "TOML (*.toml)"))
        self.body.insertWidget(1, plain_label("Valve calibration: µL delivered per ms the valve is open "
                                              "(weigh 100 openings). Leave 'not calibrated' if the rig reports µL."))
        self.use_serial.toggled.connect(self._refresh)
        (self.use_serial if self.devices else self.use_file).setChecked(True)
        self._refresh()

    def _with_browse(self, field: QLineEdit | QComboBox, title: str, filter_: str = "") -> QWidget:
        box = QWidget()
        row = QHBoxLayout(box)
        row.setContentsMargins(0, 0, 0, 0)
        row.addWidget(field, 1)
        button = QPushButton("Browse…")

        def browse() -> None:
            path, _ = QFileDialog.getOpenFileName(self, title, "", filter_)
            if path:
                (field.setText if isinstance(field, QLineEdit) else field.setCurrentText)(path)

        button.clicked.connect(browse)
        row.addWidget(button)
        return box

    def _refresh(self) -> None:
        serial = self.use_serial.isChecked()
        self.device.setEnabled(serial and bool(self.devices))
        self.reset.setEnabled(serial)
        self.file_path.setEnabled(not serial)

    def setup(self) -> RigSetup:
        """The rig as currently described (not yet checked)."""
        if self.use_serial.isChecked():
            device = self.devices[self.device.currentIndex()] if self.devices else None
            source, path = "serial", device.path if device else ""
            serial_number = device.serial_number if device else None
        else:
            source, path, serial_number = "file", self.file_path.text().strip(), None
        return RigSetup(name=self.name.text().strip(), source=source, path=path, serial_number=serial_number,
                        mapping_path=self.mapping.text().strip() or None,
                        valve_ul_per_ms=self.valve.value() or None, protocol_path=self.protocol.currentText().strip(),
                        reset=self.reset.isChecked() or source != "serial")

    def problems(self) -> list[str]:
        return rig_setup_problems(self.setup(), self.existing, self.exists)

    def emit_record(self) -> None:
        self.rig_added.emit(self.setup())
