"""Serial device discovery for the setup dialog: pyserial's port list as the UI's plain `SerialDevice`s.

Rule: the UI never imports serial; it gets a callable returning plain data.
A device is offered under its stable /dev/serial/by-id name when it has one
(it survives re-plugging), otherwise under its device path, with pyserial's
description and USB serial number (what a rig is bound to). A failure to
list ports gives an empty list, never an exception in the dialog.
"""

from __future__ import annotations

from drivers.serial import list_serial_ports
from monitor.ui.models import SerialDevice


def discover_devices() -> list[SerialDevice]:
    """Serial devices present now, in a stable order."""
    try:
        ports = list_serial_ports()
    except OSError:
        return []
    devices = []
    for port in ports:
        path = port.links[0] if port.links else port.device
        words = [w for w in (port.description, port.manufacturer, port.vid_pid) if w and w != "n/a"]
        devices.append(SerialDevice(path=path, description=" · ".join(dict.fromkeys(words)) or port.device,
                                    serial_number=port.serial_number))
    return devices
