"""Alerting: alerts the engine raised become the window's alerts, and acknowledgements go to the store.

Rule: on the GUI thread only. Each `RaisedAlert` (from the engine's rules, the
store writer's state or a plateau verdict) gets the next id, the UI's
severity, and the text as raised (device text stays plain), and is added to
the `AlertBook`; the book's `acknowledged(id, operator)` signal is handed to
the `AlertStore` together with the time. Store calls run in one worker
thread, in order (an alert is saved before its acknowledgement), never on the
GUI thread. `TableAlertStore` writes the store's `alerts` table through the
store writer; without a store nothing is kept.
"""

from __future__ import annotations

import datetime as dt
import queue
import threading
from typing import Protocol

from monitor.app.live.engine import RaisedAlert
from monitor.core.alerts import ATTENTION, INFO, URGENT
from monitor.ui.models import Alert, Severity
from monitor.ui.owners import AlertBook

SEVERITY = {URGENT: Severity.URGENT, ATTENTION: Severity.ATTENTION, INFO: Severity.INFO}


class AlertStore(Protocol):
    """Where alerts and their acknowledgements are kept (calls may block: run off the GUI thread)."""

    def save(self, alert: Alert) -> None: ...

    def acknowledge(self, alert_id: int, operator: str, when: dt.datetime) -> None: ...


class AlertCentre:
    """Turns raised alerts into `Alert`s in the book and hands acknowledgements to the store."""

    def __init__(self, book: AlertBook, store: AlertStore | None = None) -> None:
        self.book = book
        self.store = store
        self._next_id = 1
        self._calls: queue.SimpleQueue = queue.SimpleQueue()
        self._worker: threading.Thread | None = None
        self.errors: list[str] = []
        self.acknowledged: list[tuple[int, str]] = []
        self._summaries: dict[str, tuple[int, Severity | None]] | None = None   # open alerts per rig
        book.acknowledged.connect(self._on_acknowledged)
        book.alert_added.connect(self._book_changed)
        book.alert_changed.connect(self._book_changed)

    def push(self, raised: RaisedAlert) -> Alert:
        alert = Alert(id=self._next_id, time=dt.datetime.fromtimestamp(raised.wall).astimezone(), rig=raised.rig,
                      animal=raised.animal, kind=raised.alert.kind, text=raised.alert.text,
                      severity=SEVERITY[raised.alert.severity])
        self._next_id += 1
        self.book.add(alert)
        if self.store is not None:
            self._off_thread(self.store.save, alert)
        return alert

    def summary(self, rig: str) -> tuple[int, Severity | None]:
        """Open alerts of a rig and the worst of them, for its tile.

        The timer asks for every rig ~20 times a second: the book is counted once after it changed, not
        once per rig and tick.
        """
        if self._summaries is None:
            found: dict[str, tuple[int, Severity | None]] = {}
            for alert in self.book.open_alerts():
                count, worst = found.get(alert.rig, (0, None))
                found[alert.rig] = (count + 1, alert.severity if worst is None or alert.severity.rank > worst.rank
                                    else worst)
            self._summaries = found
        return self._summaries.get(rig, (0, None))

    def _book_changed(self, alert_id: int) -> None:
        self._summaries = None

    def _on_acknowledged(self, alert_id: int, operator: str) -> None:
        self.acknowledged.append((alert_id, operator))
        alert = self.book.get(alert_id)
        if self.store is not None and alert is not None and alert.acknowledged_at is not None:
            self._off_thread(self.store.acknowledge, alert_id, operator, alert.acknowledged_at)

    def _off_thread(self, fn, *args) -> None:
        if self._worker is None:
            self._worker = threading.Thread(target=self._serve, name="alert store", daemon=True)
            self._worker.start()
        self._calls.put((fn, args))

    def _serve(self) -> None:
        while True:
            fn, args = self._calls.get()
            try:
                fn(*args)
            except Exception as exc:  # noqa: BLE001 - kept and shown by the app, never raised in a thread
                self.errors.append(f"{type(exc).__name__}: {exc}")


class TableAlertStore:
    """The store's `alerts` table, written through the store writer (blocking calls: worker thread only)."""

    def __init__(self, writer) -> None:
        self.writer = writer
        self._rows: dict[int, int] = {}     # alert id in the window -> row id in the table

    def save(self, alert: Alert) -> None:
        def insert(conn) -> int:
            animal_id = None
            if alert.animal:
                from monitor.store.registry import ensure_animal

                animal_id = ensure_animal(conn, alert.animal)
            return int(conn.execute("INSERT INTO alerts (animal_id, rig, kind, level, message, raised_at) "
                                    "VALUES (?, ?, ?, ?, ?, ?)", (animal_id, alert.rig, alert.kind,
                                                                  alert.severity.word, alert.text,
                                                                  alert.time.timestamp())).lastrowid)
        self._rows[alert.id] = self.writer.call(insert)

    def acknowledge(self, alert_id: int, operator: str, when: dt.datetime) -> None:
        row = self._rows.get(alert_id)
        if row is not None:
            self.writer.call(lambda c: c.execute("UPDATE alerts SET acknowledged_by = ?, acknowledged_at = ? "
                                                 "WHERE id = ?", (operator, when.timestamp(), row)))
