"""Model owners: QObjects that hold the latest view models and announce changes.

Rule: the app pushes states in from the GUI thread (its ~20 Hz timer); an owner
keeps the newest state per key and emits one signal per key that actually
changed (a tile state equal to the shown one, or an animal page whose parts
are all the same objects, emits nothing). Widgets subscribe when built and
disconnect when closed. Owners are changed from their own (the GUI) thread
only; a call from another thread is refused with RuntimeError, because worker
threads must hand their results over through queued signals. Requests that need the store (acknowledging an alert)
change the owner first and are announced by a signal the app listens to.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import replace

from PySide6.QtCore import QObject, QThread, Signal

from monitor.ui.models import Alert, AnimalPageState, RigTileState, Severity


def _on_own_thread(owner: QObject) -> None:
    if QThread.currentThread() is not owner.thread():
        raise RuntimeError(f"{type(owner).__name__} is changed from the GUI thread only")


class RigBoard(QObject):
    """Latest tile state per rig, in the order rigs were first seen."""

    rig_added = Signal(str)
    rig_changed = Signal(str)
    rig_removed = Signal(str)

    def __init__(self, parent: QObject | None = None) -> None:
        super().__init__(parent)
        self._states: dict[str, RigTileState] = {}

    def update(self, state: RigTileState) -> bool:
        """Keep `state`; True (and a signal) when it differs from the one held."""
        _on_own_thread(self)
        old = self._states.get(state.rig)
        if old == state:
            return False
        self._states[state.rig] = state
        (self.rig_added if old is None else self.rig_changed).emit(state.rig)
        return True

    def remove(self, rig: str) -> None:
        if self._states.pop(rig, None) is not None:
            self.rig_removed.emit(rig)

    def state(self, rig: str) -> RigTileState | None:
        return self._states.get(rig)

    def rigs(self) -> list[str]:
        return list(self._states)


def _same_parts(a: AnimalPageState, b: AnimalPageState) -> bool:
    return (a.rig == b.rig and a.protocol == b.protocol and a.today is b.today and a.curve is b.curve
            and a.consolidation is b.consolidation and a.sessions == b.sessions and a.care_text == b.care_text
            and a.eligibility_text == b.eligibility_text)


class AnimalBook(QObject):
    """Latest page state per animal."""

    animal_changed = Signal(str)

    def __init__(self, parent: QObject | None = None) -> None:
        super().__init__(parent)
        self._states: dict[str, AnimalPageState] = {}

    def update(self, state: AnimalPageState) -> bool:
        _on_own_thread(self)
        old = self._states.get(state.animal)
        if old is not None and _same_parts(old, state):
            return False
        self._states[state.animal] = state
        self.animal_changed.emit(state.animal)
        return True

    def state(self, animal: str) -> AnimalPageState | None:
        return self._states.get(animal)

    def animals(self) -> list[str]:
        return sorted(self._states)


class AlertBook(QObject):
    """The alerts of this run, newest last; acknowledging is a change the app stores."""

    alert_added = Signal(int)
    alert_changed = Signal(int)
    acknowledged = Signal(int, str)      # alert id, operator name

    def __init__(self, parent: QObject | None = None) -> None:
        super().__init__(parent)
        self._alerts: dict[int, Alert] = {}

    def add(self, alert: Alert) -> None:
        """Add a new alert, or replace one with the same id (e.g. acknowledged elsewhere)."""
        _on_own_thread(self)
        known = alert.id in self._alerts
        self._alerts[alert.id] = alert
        (self.alert_changed if known else self.alert_added).emit(alert.id)

    def acknowledge(self, alert_id: int, operator: str, when: dt.datetime | None = None) -> bool:
        """Mark an alert as seen by `operator`; False if unknown, already done or no name."""
        alert = self._alerts.get(alert_id)
        name = operator.strip()
        if alert is None or alert.acknowledged_by is not None or not name:
            return False
        self._alerts[alert_id] = replace(alert, acknowledged_by=name,
                                         acknowledged_at=when or dt.datetime.now().astimezone())
        self.alert_changed.emit(alert_id)
        self.acknowledged.emit(alert_id, name)
        return True

    def get(self, alert_id: int) -> Alert | None:
        return self._alerts.get(alert_id)

    def alerts(self) -> list[Alert]:
        return list(self._alerts.values())

    def open_alerts(self, rig: str | None = None) -> list[Alert]:
        """Alerts nobody has acknowledged yet (of one rig when given)."""
        return [a for a in self._alerts.values()
                if a.acknowledged_by is None and (rig is None or a.rig == rig)]

    def worst_open(self, rig: str | None = None) -> Severity | None:
        open_ = self.open_alerts(rig)
        return max((a.severity for a in open_), key=lambda s: s.rank) if open_ else None
