"""Alerts: the book (model), the list (model→UI), acknowledging (UI→model), sound and tray."""

from __future__ import annotations

import datetime as dt

from PySide6.QtCore import Qt
from PySide6.QtWidgets import QSystemTrayIcon

from monitor.ui import sample
from monitor.ui.alerts import AlertNotifier, AlertPanel, alert_text
from monitor.ui.models import Alert, Severity
from monitor.ui.owners import AlertBook

T0 = dt.datetime(2026, 3, 25, 10, 0)


def alert(i: int, severity: Severity = Severity.ATTENTION, minutes: int = 0, text: str = "No events for 10 min.",
          **kw) -> Alert:
    return Alert(i, T0 + dt.timedelta(minutes=minutes), f"box-{i:02d}", None, "silent", text, severity, **kw)


def test_book_acknowledges_once_with_a_name(qtbot):
    book = AlertBook()
    book.add(alert(1))
    assert not book.acknowledge(1, "   ")                       # a name is required
    with qtbot.waitSignal(book.acknowledged) as done:
        assert book.acknowledge(1, " R. Okafor ", when=T0)
    assert done.args == [1, "R. Okafor"]
    assert book.get(1).acknowledged_by == "R. Okafor" and book.get(1).acknowledged_at == T0
    assert not book.acknowledge(1, "someone else")             # already acknowledged
    assert not book.acknowledge(99, "R. Okafor")               # unknown id
    assert book.open_alerts() == []


def test_worst_open_severity_per_rig():
    book = AlertBook()
    book.add(alert(1, Severity.INFO))
    book.add(Alert(2, T0, "box-01", None, "lost", "gone", Severity.URGENT))
    assert book.worst_open("box-01") is Severity.URGENT
    assert book.worst_open("box-07") is None


# --- model -> UI ---------------------------------------------------------------
def test_panel_is_quiet_when_all_is_well(qtbot):
    panel = AlertPanel(AlertBook())
    qtbot.addWidget(panel)
    assert panel.summary.text() == "All quiet: no open alerts."
    assert panel.list.count() == 0


def test_panel_lists_alerts_newest_first_with_kind_time_rig_text(qtbot):
    book = AlertBook()
    for a in sample.alerts():
        book.add(a)
    panel = AlertPanel(book)
    qtbot.addWidget(panel)
    ids = [panel.list.item(r).data(Qt.ItemDataRole.UserRole) for r in range(panel.list.count())]
    assert ids == [3, 2, 1, 4]                                   # by time, newest at the top
    first = panel.list.item(0).text().splitlines()
    assert first[0] == "OPEN, urgent  ·  10:38  box-16  ·  disconnected"
    assert first[1] == "Lost the device at /dev/ttyACM15; it has not come back."
    assert panel.summary.text() == "3 open alerts (1 urgent, 2 attention); 1 resolved (ticked)."
    assert panel.item(4).text().startswith("resolved") and panel.item(4).text().endswith("seen by R. Okafor")
    book.add(alert(5, minutes=60))
    assert panel.list.item(0).data(Qt.ItemDataRole.UserRole) == 5
    assert panel.summary.text().startswith("4 open alerts")
    # the open count is the number of rows drawn without the resolved tick and word
    drawn_open = [r for r in range(panel.list.count()) if panel.list.item(r).text().startswith("OPEN")]
    assert len(drawn_open) == 4 == len(book.open_alerts())
    assert panel.item(4).font().italic() and not panel.item(5).font().italic()
    assert panel.item(4).icon().cacheKey() != panel.item(5).icon().cacheKey()


def test_alert_text_from_a_device_is_kept_literally(qtbot):
    book = AlertBook()
    book.add(alert(1, text="<b>lever</b> &amp; valve"))
    panel = AlertPanel(book)
    qtbot.addWidget(panel)
    assert alert_text(book.get(1)).splitlines()[1] == "<b>lever</b> &amp; valve"
    assert panel.item(1).text().splitlines()[1] == "<b>lever</b> &amp; valve"


# --- UI -> model ---------------------------------------------------------------
def test_acknowledge_needs_the_operators_name(qtbot):
    book = AlertBook()
    book.add(alert(1))
    panel = AlertPanel(book)
    qtbot.addWidget(panel)
    panel.select(1)
    with qtbot.assertNotEmitted(book.acknowledged):
        assert not panel.acknowledge_selected()
    assert "Type your name" in panel.message.text()
    qtbot.keyClicks(panel.operator, "J. Lind")
    with qtbot.waitSignal(book.acknowledged) as done:
        qtbot.mouseClick(panel.ack_button, Qt.MouseButton.LeftButton)
    assert done.args == [1, "J. Lind"]
    assert panel.summary.text() == "All quiet: no open alerts; 1 resolved (ticked)."
    assert panel.item(1).text().endswith("seen by J. Lind")


def test_acknowledge_without_selection_takes_the_oldest_open_alert(qtbot):
    book = AlertBook()
    book.add(alert(1, minutes=0))
    book.add(alert(2, minutes=5))
    panel = AlertPanel(book)
    qtbot.addWidget(panel)
    panel.operator.setText("J. Lind")
    with qtbot.waitSignal(book.acknowledged) as done:
        qtbot.keyClick(panel.operator, Qt.Key.Key_Return)
    assert done.args == [1, "J. Lind"]
    assert panel.acknowledge_selected() and not panel.acknowledge_selected()
    assert panel.message.text() == "Nothing to acknowledge."


# --- sound and tray ------------------------------------------------------------
def test_only_alerts_that_need_a_person_beep(qtbot):
    beeps = []
    book = AlertBook()
    notifier = AlertNotifier(book, beep=lambda: beeps.append(1))
    book.add(alert(1, Severity.INFO))
    book.add(alert(2, Severity.ATTENTION))
    assert beeps == []
    with qtbot.waitSignal(notifier.notified) as notified:
        book.add(alert(3, Severity.URGENT))
    assert beeps == [1] and notified.args == [3]
    book.add(alert(3, Severity.URGENT, acknowledged_by="x"))     # an update, not a new alert
    assert beeps == [1]


def test_without_a_tray_the_notifier_still_alerts(qtbot):
    assert not QSystemTrayIcon.isSystemTrayAvailable()         # offscreen, as STACK-NOTES.md measured
    beeps = []
    book = AlertBook()
    notifier = AlertNotifier(book, beep=lambda: beeps.append(1))
    assert notifier.tray is None
    book.add(alert(1, Severity.URGENT))
    assert beeps == [1]
