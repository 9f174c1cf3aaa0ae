"""The controller: sources → Fanout → (store writer, engine) → a ~20 Hz timer on the GUI thread → owners.

Rule: the composition root of the desktop window, wiring and the refresh tick
only. Each rig is one source whose reader thread calls its `Fanout`; the
store writer and the engine run in their own threads. A QTimer on the GUI
thread (`refresh`, ~20 Hz) runs the callables workers posted, takes the
engine's latest snapshots and alerts, and pushes view models to the
RigBoard, AnimalBook and AlertBook, which announce only what changed (so an
unchanged tile is not repainted). The parts: worker jobs (`jobs.Jobs`), the
rigs and their sessions (`rig_sessions.RigSessions`: check-in, check-out,
unattended runs), the pages (`pages.Pages`: histories, fits, what a page
shows), alerting (`alerting.AlertCentre`). `close()` stops the sources, ends
open sessions and flushes the writer; every platform's stop requests call it
(monitor.app.stopping).
"""

from __future__ import annotations

import sys
import time
from typing import Any

from PySide6.QtCore import QObject, QTimer
from PySide6.QtWidgets import QApplication

from monitor.app.live import views
from monitor.app.live.engine import Engine, RaisedAlert
from monitor.app.rigs import LoadedProtocol
from monitor.app.stopping import StopRequests
from monitor.app.window.alerting import AlertCentre, AlertStore, TableAlertStore
from monitor.app.window.jobs import Jobs
from monitor.app.window.pages import HistoryProvider, Pages, StoreHistory
from monitor.app.window.rig_sessions import RigSessions
from monitor.core.alerts import AlertRules, store_alert
from monitor.store.writer import StoreWriter
from monitor.ui.owners import AlertBook, AnimalBook, RigBoard

REFRESH_MS = 50
SWITCH_INTERVAL_S = 0.001  # Python's default 5 ms let 16 reader threads delay each Qt call (bench_latency.py)


class Controller(QObject):
    """Wires the live path and the window; GUI thread only (except where a method says otherwise)."""

    def __init__(self, writer: StoreWriter, *, history: HistoryProvider | None = None,
                 rules: AlertRules = AlertRules(), alert_store: AlertStore | None | str = "store",
                 protocols: dict[str, LoadedProtocol] | None = None, refresh_ms: int = REFRESH_MS,
                 fit_consolidation: bool = True, parent: QObject | None = None) -> None:
        super().__init__(parent)
        self.writer = writer
        self.engine = Engine(rules=rules)
        self.board, self.book, self.alert_book = RigBoard(self), AnimalBook(self), AlertBook(self)
        self.alerts = AlertCentre(self.alert_book, TableAlertStore(writer) if alert_store == "store" else alert_store)
        self.protocols: dict[str, LoadedProtocol] = dict(protocols or {})   # by animal
        self.jobs = Jobs()
        self.run_job = self.jobs.run_job
        self.sessions = RigSessions(self)
        self.pages = Pages(self, history or StoreHistory(writer.path), fit_consolidation)
        self.rigs = self.sessions.rigs
        self.history_parts, self.fits = self.pages.history_parts, self.pages.fits
        self.add_rig, self.start_source, self.roster = self.sessions.add_rig, self.sessions.start_source, \
            self.sessions.roster
        self.check_in, self.check_out = self.sessions.check_in, self.sessions.check_out
        self.give_unattended, self.load_history = self.sessions.give_unattended, self.pages.load_history
        self.window = None
        self.decisions_and_care = None          # eligibility and care (monitor/app/window/eligibility_care.py) once attached
        self.recorded_animals: set[str] = set()  # added in the animals window this run (offered at check-in)
        self.animal_records = None   # the animals window's side (monitor/app/window/animal_window.py) once attached
        self._store_failing = False
        self._status_shown = None
        self.painted: list[tuple[str, float]] = []    # (rig, reader stamp) of tile states handed to the board
        self.refresh_seconds: list[float] = []
        self.closed = False
        self._stops: StopRequests | None = None
        self.timer = QTimer(self)
        self.timer.setInterval(refresh_ms)
        self.timer.timeout.connect(self.refresh)

    # --- start, stop -----------------------------------------------------------------------
    def start(self, switch_interval_s: float = SWITCH_INTERVAL_S) -> None:
        """Start the engine and the timer; shorten the interpreter's thread switch interval so the GUI
        thread gets the GIL back within ~1 ms from the reader, engine and writer threads."""
        sys.setswitchinterval(switch_interval_s)
        self.engine.start()
        self.timer.start()

    def attach(self, window, care=None) -> None:
        """Connect a MainWindow's requests and put the job progress into its status bar; `care`: a CareConfig."""
        self.window = window
        window.checked_in.connect(self.check_in)
        window.checked_out.connect(self.check_out)
        window.rig_added.connect(self.sessions.add_from_setup)
        window.page_opened.connect(self.pages.opened)
        window.page_closed.connect(self.pages.closed)
        window.exclusion_requested.connect(self.pages.exclude)
        window.condition_requested.connect(self.pages.add_condition)
        window.unattended_given.connect(self.give_unattended)
        self.jobs.attach(window)
        window.set_roster(self.roster())
        self.sessions.load_stored_stages()
        from monitor.app.window.animal_window import AnimalRecordsSide
        from monitor.app.window.effects_side import EffectsSide
        from monitor.app.window.eligibility_care import DecisionsAndCare

        self.decisions_and_care = DecisionsAndCare(self, care)
        self.decisions_and_care.attach(window)
        self.animal_records = AnimalRecordsSide(self)
        self.animal_records.attach(window)
        EffectsSide(self).attach(window)
        from monitor.app.window.file_jobs import FileJobs

        self.file_jobs = FileJobs(self)
        self.file_jobs.attach(window)

    def install_signal_handlers(self, app: QApplication) -> None:
        """Every platform's stop requests (monitor.app.stopping) close cleanly (the 20 Hz timer lets
        Python run the handler promptly)."""
        def handler() -> None:
            self.close()
            app.quit()
            QTimer.singleShot(0, app.quit)    # also when the event loop has not started yet
        self._stops = StopRequests(handler).install()

    def close(self) -> bool:
        """Stop the sources, end sessions, flush the store; True when every row was stored."""
        if self.closed:
            return True
        self.closed = True
        self.timer.stop()
        if self._stops is not None:
            self._stops.restore()
        self.jobs.cancel_all()
        self.sessions.close()
        self.engine.stop()
        stored = self.writer.stop()
        if self._stops is not None:
            self._stops.finished()           # a console close (Windows) may end the process now
        return stored

    # --- what the parts share -----------------------------------------------------------------
    def say(self, message: str) -> None:
        """One line in the status bar for 15 s."""
        if self.window is not None:
            self.window.statusBar().showMessage(message, 15000)

    def operator(self) -> str:
        """The name in the alert panel's Operator field."""
        return self.window.alert_panel.operator.text().strip() if self.window is not None else ""

    def refresh_roster(self) -> None:
        if self.window is not None:
            self.window.set_roster(self.roster())

    # --- the timer ---------------------------------------------------------------------------------------
    def refresh(self) -> None:
        """One tick on the GUI thread: inbox, snapshots, alerts, tiles, pages, status bar."""
        started = time.perf_counter()
        self.jobs.drain()
        fresh = self.engine.take_snapshots()
        for name, snap in fresh.items():
            if name in self.rigs:
                self.rigs[name].snapshot = snap
        for raised in self.engine.take_alerts():
            self.alerts.push(raised)
        wstatus = self.writer.status()
        failing = wstatus.state in ("failed", "overflow")
        alert = store_alert(self._store_failing, failing, wstatus.text)
        self._store_failing = failing
        if alert is not None:
            self.alerts.push(RaisedAlert("", None, alert, time.time()))
        now = time.monotonic()
        statuses: dict[str, Any] = {}
        for name, rig in self.rigs.items():
            status = rig.source.status()
            statuses[name] = status
            count, worst = self.alerts.summary(name)
            tile = views.tile_state(name, rig.snapshot, status, now=now, source_text=rig.spec.path,
                                    alert_count=count, alert_severity=worst)
            if self.board.update(tile) and name in fresh:
                self.painted.append((name, fresh[name].newest_stamp))
            if rig.animal and name in fresh:
                self.pages.push(rig.animal)
        bar = views.status_state(statuses, wstatus.state, wstatus.text, wstatus.committed_events)
        if self.window is not None and bar != self._status_shown:
            self._status_shown = bar
            self.window.set_status(bar)
        self.refresh_seconds.append(time.perf_counter() - started)
        del self.refresh_seconds[:-1000]
        del self.painted[:-10000]
