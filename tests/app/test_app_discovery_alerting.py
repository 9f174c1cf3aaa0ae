"""monitor.app.window.discovery (pyserial's port list as plain data) and monitor.app.window.alerting (raised → book)."""

from __future__ import annotations

from serial.tools import list_ports_common

from monitor.app.window import discovery
from monitor.app.window.alerting import AlertCentre
from monitor.app.live.engine import RaisedAlert
from monitor.core.alerts import ATTENTION, INFO, URGENT, Raised
from monitor.ui.models import SerialDevice, Severity
from monitor.ui.owners import AlertBook


def test_discovery_maps_pyserials_port_info(monkeypatch):
    board = list_ports_common.ListPortInfo("/dev/ttyACM0", skip_link_detection=True)   # pyserial's own type
    board.description, board.serial_number, board.vid, board.pid = "Uno <b>R3</b>", "8573531", 0x2341, 0x0043
    board.manufacturer = "Arduino"
    bare = list_ports_common.ListPortInfo("/dev/ttyS0", skip_link_detection=True)
    monkeypatch.setattr("serial.tools.list_ports.comports", lambda *a, **k: [board, bare])
    monkeypatch.setattr("drivers.serial._stable_links", lambda folder="": {})
    found = discovery.discover_devices()
    assert found[0] == SerialDevice("/dev/ttyACM0", "Uno <b>R3</b> · Arduino · 2341:0043", "8573531")
    assert found[1].path == "/dev/ttyS0" and found[1].serial_number is None and found[1].description


def test_discovery_prefers_the_stable_by_id_name(monkeypatch):
    board = list_ports_common.ListPortInfo("/dev/ttyACM1", skip_link_detection=True)
    board.serial_number = "X1"
    monkeypatch.setattr("serial.tools.list_ports.comports", lambda *a, **k: [board])
    monkeypatch.setattr("drivers.serial._stable_links",
                        lambda folder="": {"/dev/ttyACM1": ("/dev/serial/by-id/usb-box-X1",)})
    monkeypatch.setattr("os.path.realpath", lambda p: p)
    assert discovery.discover_devices()[0].path == "/dev/serial/by-id/usb-box-X1"


def test_discovery_failure_is_an_empty_list(monkeypatch):
    def broken(*a, **k):
        raise OSError("no /sys")
    monkeypatch.setattr("serial.tools.list_ports.comports", broken)
    assert discovery.discover_devices() == []


def test_centre_numbers_alerts_maps_severity_and_summarises_per_rig(qtbot):
    book = AlertBook()
    centre = AlertCentre(book)
    for kind, word in (("silent", ATTENTION), ("valve open too long", URGENT), ("reconnected", INFO)):
        centre.push(RaisedAlert("box1", "wren", Raised(kind, word, f"{kind} text"), 1_700_000_000.0))
    centre.push(RaisedAlert("box2", None, Raised("disconnected", ATTENTION, "x"), 1_700_000_001.0))
    alerts = book.alerts()
    assert [a.id for a in alerts] == [1, 2, 3, 4]
    assert [a.severity for a in alerts] == [Severity.ATTENTION, Severity.URGENT, Severity.INFO, Severity.ATTENTION]
    assert alerts[0].time.tzinfo is not None and alerts[0].animal == "wren"
    assert centre.summary("box1") == (3, Severity.URGENT)
    book.acknowledge(2, "ana")
    assert centre.summary("box1") == (2, Severity.ATTENTION)
    assert centre.acknowledged == [(2, "ana")]
    assert centre.summary("box3") == (0, None)
