"""The alert list, acknowledging with a name, and the sound / tray for urgent alerts.

Rule: every alert goes into the in-window list (kind, time, rig, text, and its
severity as a word); an open alert is drawn with its severity's shape and the
word OPEN, a resolved one (acknowledged, or cleared because it is no longer
true) with a tick, in italics and the word "resolved", so the open count
above the list is the number of rows without a tick. Only URGENT alerts —
those that need a person — beep and, where the desktop has a tray (`QSystemTrayIcon.isSystemTrayAvailable()`), show
a tray message. Without a tray the list and the sound still alert. When nothing
is open the panel says so in one quiet line. Acknowledging needs the operator's
name and goes through the AlertBook, which announces it for the app to store.
Alert text comes from devices and files: it is set as plain text only.
"""

from __future__ import annotations

from typing import Callable

from PySide6.QtCore import QObject, QPointF, Qt, Signal
from PySide6.QtGui import QCloseEvent, QIcon, QPainter, QPalette, QPixmap
from PySide6.QtWidgets import (
    QApplication,
    QHBoxLayout,
    QLineEdit,
    QListView,
    QListWidget,
    QListWidgetItem,
    QPushButton,
    QSystemTrayIcon,
    QVBoxLayout,
    QWidget,
)

from monitor.ui.dialogs import plain_label
from monitor.ui.models import CLEARED_BY, Alert, Severity
from monitor.ui.owners import AlertBook
from monitor.ui.theme import SEVERITY_COLOUR, colour, draw_shape

RESOLVED_SHAPE = "tick"


def alert_text(alert: Alert) -> str:
    """The list's text for one alert: open or resolved first, then time, box and kind; its text; who saw it."""
    where = f"  {alert.rig}" if alert.rig else ""
    kind = alert.kind.replace("_", " ")
    if alert.acknowledged_by is None:
        head = f"OPEN, {alert.severity.word}  ·  {alert.time.strftime('%H:%M')}{where}  ·  {kind}"
        return "\n".join([head, alert.text])
    head = f"resolved  ·  {alert.time.strftime('%H:%M')}{where}  ·  {kind}"
    who = alert.acknowledged_by
    seen = "cleared by itself: no longer true" if who == CLEARED_BY else f"seen by {who}"
    return "\n".join([head, alert.text, seen])


def summary_text(open_alerts: list[Alert], resolved: int, sources: str = "") -> str:
    """One line over the list: how many open alerts and how urgent, and how many are resolved; never "all quiet"
    while `sources` says some box is not reading."""
    tail = f"; {resolved} resolved (ticked)" if resolved else ""
    if not open_alerts and sources:
        return f"No open alerts{tail}, but {sources} (status bar)."
    if not open_alerts:
        return f"All quiet: no open alerts{tail}."
    counts = {s: sum(a.severity is s for a in open_alerts) for s in Severity}
    parts = ", ".join(f"{n} {s.word}" for s, n in sorted(counts.items(), key=lambda kv: -kv[0].rank) if n)
    noun = "alert" if len(open_alerts) == 1 else "alerts"
    return f"{len(open_alerts)} open {noun} ({parts}){tail}."


def severity_icon(word: str, shape: str, size: int = 20) -> QIcon:
    """A small icon drawing the severity's shape in its colour."""
    pixmap = QPixmap(size, size)
    pixmap.fill(Qt.GlobalColor.transparent)
    painter = QPainter(pixmap)
    draw_shape(painter, shape, QPointF(size / 2, size / 2), size * 0.8, colour(SEVERITY_COLOUR[word]))
    painter.end()
    return QIcon(pixmap)


class AlertPanel(QWidget):
    """The alert list with an operator field and an Acknowledge button."""

    def __init__(self, book: AlertBook, parent: QWidget | None = None) -> None:
        super().__init__(parent)
        self.book = book
        self.summary = plain_label()
        font = self.summary.font()
        font.setPointSizeF(font.pointSizeF() * 1.25)
        font.setBold(True)
        self.summary.setFont(font)
        self.list = QListWidget()
        self.list.setWordWrap(True)
        self.list.setResizeMode(QListView.ResizeMode.Adjust)
        self.list.setAlternatingRowColors(True)
        self.list.setTextElideMode(Qt.TextElideMode.ElideNone)
        self.operator = QLineEdit()
        self.operator.setPlaceholderText("your name")
        self.ack_button = QPushButton("Acknowledge")
        self.ack_button.clicked.connect(self.acknowledge_selected)
        self.operator.returnPressed.connect(self.acknowledge_selected)
        self.message = plain_label()
        row = QHBoxLayout()
        row.addWidget(plain_label("Operator", wrap=False))
        row.addWidget(self.operator, 1)
        row.addWidget(self.ack_button)
        layout = QVBoxLayout(self)
        layout.setContentsMargins(4, 4, 4, 4)
        layout.addWidget(plain_label("Alerts", wrap=False))
        layout.addWidget(self.summary)
        layout.addWidget(self.list, 1)
        layout.addLayout(row)
        layout.addWidget(self.message)
        self._items: dict[int, QListWidgetItem] = {}
        self._sources = ""
        self._icons = {word: severity_icon(word, shape) for word, shape in
                       ((s.word, s.shape) for s in Severity)}
        self._resolved_icon = severity_icon("info", RESOLVED_SHAPE)
        for alert in book.alerts():
            self._show(alert.id)
        self._refresh_summary()
        book.alert_added.connect(self._on_added)
        book.alert_changed.connect(self._on_changed)
        self._connected = True

    def set_sources(self, trouble: str) -> None:
        """Boxes not reading, in words ("" when every box reads): the summary never says all quiet then."""
        if trouble != self._sources:
            self._sources = trouble
            self._refresh_summary()

    def item(self, alert_id: int) -> QListWidgetItem | None:
        return self._items.get(alert_id)

    def selected_id(self) -> int | None:
        items = self.list.selectedItems()
        return items[0].data(Qt.ItemDataRole.UserRole) if items else None

    def select(self, alert_id: int) -> None:
        item = self._items.get(alert_id)
        if item is not None:
            self.list.setCurrentItem(item)

    def acknowledge_selected(self) -> bool:
        """Acknowledge the selected alert (or the oldest open one) as the typed operator."""
        alert_id = self.selected_id()
        if alert_id is None or self.book.get(alert_id) is None or self.book.get(alert_id).acknowledged_by:
            open_ = self.book.open_alerts()
            alert_id = open_[0].id if open_ else None
        if alert_id is None:
            self.message.setText("Nothing to acknowledge.")
            return False
        if not self.operator.text().strip():
            self.message.setText("Type your name in Operator to acknowledge.")
            self.operator.setFocus()
            return False
        done = self.book.acknowledge(alert_id, self.operator.text())
        self.message.setText("" if done else "That alert was already acknowledged.")
        return done

    def _on_added(self, alert_id: int) -> None:
        self._show(alert_id)
        self._refresh_summary()
        self.list.scrollToItem(self._items[alert_id])

    def _on_changed(self, alert_id: int) -> None:
        self._show(alert_id)
        self._refresh_summary()

    def _show(self, alert_id: int) -> None:
        alert = self.book.get(alert_id)
        if alert is None:
            return
        item = self._items.get(alert_id)
        if item is None:
            item = QListWidgetItem()
            item.setData(Qt.ItemDataRole.UserRole, alert_id)
            self.list.insertItem(self._position(alert), item)   # newest at the top
            self._items[alert_id] = item
        item.setText(alert_text(alert))
        resolved = alert.acknowledged_by is not None
        item.setIcon(self._resolved_icon if resolved else self._icons[alert.severity.word])
        font = item.font()
        font.setBold(not resolved and alert.severity.rank > 0)
        font.setItalic(resolved)
        item.setFont(font)
        item.setForeground(self.palette().color(QPalette.ColorRole.PlaceholderText) if resolved
                           else self.palette().color(QPalette.ColorRole.Text))

    def _position(self, alert: Alert) -> int:
        """Row for a new alert so that the list stays newest first."""
        for row in range(self.list.count()):
            shown = self.book.get(self.list.item(row).data(Qt.ItemDataRole.UserRole))
            if shown is not None and shown.time <= alert.time:
                return row
        return self.list.count()

    def _refresh_summary(self) -> None:
        open_ = self.book.open_alerts()
        self.summary.setText(summary_text(open_, len(self.book.alerts()) - len(open_), self._sources))
        if not open_ and self._sources:
            self.summary.setStyleSheet(f"color: {colour(SEVERITY_COLOUR['attention']).darker(130).name()};")
        elif not open_:
            self.summary.setStyleSheet("")
        else:
            worst = max(open_, key=lambda a: a.severity.rank).severity
            self.summary.setStyleSheet(f"color: {colour(SEVERITY_COLOUR[worst.word]).name()};")

    def disconnect_book(self) -> None:
        if self._connected:
            self.book.alert_added.disconnect(self._on_added)
            self.book.alert_changed.disconnect(self._on_changed)
            self._connected = False

    def closeEvent(self, event: QCloseEvent) -> None:
        self.disconnect_book()
        super().closeEvent(event)


class AlertNotifier(QObject):
    """Beeps and shows a tray message for new alerts that need a person."""

    notified = Signal(int)   # alert id, after a sound (and a tray message where there is a tray)

    def __init__(self, book: AlertBook, icon: QIcon | None = None, beep: Callable[[], None] = QApplication.beep,
                 parent: QObject | None = None) -> None:
        super().__init__(parent)
        self.book = book
        self.beep = beep
        self.tray: QSystemTrayIcon | None = None
        if QSystemTrayIcon.isSystemTrayAvailable():
            self.tray = QSystemTrayIcon(icon or QIcon(), self)
            self.tray.setToolTip("rigside")
            self.tray.show()
        book.alert_added.connect(self._on_added)

    def _on_added(self, alert_id: int) -> None:
        alert = self.book.get(alert_id)
        if alert is None or not alert.severity.loud or alert.acknowledged_by:
            return
        self.beep()
        if self.tray is not None and QSystemTrayIcon.supportsMessages():
            self.tray.showMessage(f"{alert.rig}: {alert.kind}", alert.text, QSystemTrayIcon.MessageIcon.Warning,
                                  10_000)
        self.notified.emit(alert_id)
