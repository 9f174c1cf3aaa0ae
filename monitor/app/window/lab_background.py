"""The window's link to the lab database: a background sync, its state in the status bar, the lab view.

Rule: the URL is the PC's own (RIGSIDE_LAB, else `[lab] url` in the settings
file); without one the status bar says "lab: not set" and nothing runs. Every
`interval_s` (and on "Sync now") `rigside sync` runs as a separate process
(QProcess), so neither the network nor the sync's work touches the GUI
thread or the live path; one at a time, and a sync still running when the
window closes is killed (the next one resumes where it stopped). After each
run the state is read from the local store (monitor.store.lab_sync.sync_status)
and said in words. The lab view reads `rigside lab show --json` the same way;
an animal's pages open read-only from the lab (monitor.app.window.lab_pages, a
worker thread).
"""

from __future__ import annotations

import json
import sys
from pathlib import Path
from typing import Any

from PySide6.QtCore import QObject, QProcess, QTimer
from PySide6.QtGui import QAction

from monitor.ui.dialogs import plain_label
from monitor.ui.lab_view import LabWindow

SYNC_INTERVAL_S = 300


def status_text(state: dict[str, Any] | None, running: bool, url: str | None) -> str:
    """The status bar's words for the lab: not set, syncing, synced (when, rows waiting), or unreachable."""
    if not url:
        return "lab: not set"
    if running:
        return "lab: syncing…"
    if state is None:
        return "lab: state unknown"
    waiting = f"{state['rows_waiting']} waiting"
    if state.get("unreachable_since"):
        return f"lab: unreachable since {_clock(state['unreachable_since'])}, {waiting}"
    if state.get("last_error"):
        why = state["last_error"] if len(state["last_error"]) <= 80 else state["last_error"][:79] + "…"
        return f"lab: not synced ({why}), {waiting}"
    if state.get("last_sync_at"):
        return f"lab: synced {_clock(state['last_sync_at'])}, {waiting}"
    return f"lab: never synced, {waiting}"


def _clock(stamp: str) -> str:
    """'2026-03-02T10:42:05Z' -> '2026-03-02 10:42 UTC'."""
    return stamp.replace("T", " ")[:16] + " UTC"


class LabLink(QObject):
    """Background sync and the lab view for one window."""

    def __init__(self, window, db_path: Path, settings_file: Path, url: str | None,
                 interval_s: float = SYNC_INTERVAL_S) -> None:
        super().__init__(window)
        self.window, self.db_path, self.settings_file, self.url = window, db_path, settings_file, url
        self.sync_process: QProcess | None = None
        self.show_process: QProcess | None = None
        self.pages = None   # monitor.app.window.lab_pages.LabPages, made when the first page is asked for
        self.view: LabWindow | None = None
        self.label = plain_label(wrap=False)
        self.label.setObjectName("lab_state")
        window.statusBar().addPermanentWidget(self.label)
        menu = window.menuBar().addMenu("&Lab")
        for text, slot in (("Lab &database…", self.open_view), ("&Sync now", self.sync_now)):
            action = QAction(text, window)
            action.triggered.connect(slot)
            menu.addAction(action)
        self.timer = QTimer(self)
        self.timer.setInterval(int(interval_s * 1000))
        self.timer.timeout.connect(self.sync_now)
        self._set_url(url)

    def _set_url(self, url: str | None) -> None:
        self.url = url or None
        if self.url:
            self.timer.start()
            QTimer.singleShot(0, self.sync_now)
        else:
            self.timer.stop()
        self.refresh_state()

    def state(self) -> dict[str, Any] | None:
        from monitor.store.db import StoreError, open_store
        from monitor.store.lab_sync import sync_status

        try:
            conn = open_store(self.db_path, readonly=True)
        except StoreError:
            return None
        try:
            return sync_status(conn)
        finally:
            conn.close()

    def refresh_state(self) -> None:
        text = status_text(self.state(), self.sync_process is not None, self.url)
        self.label.setText(text)
        if self.view is not None:
            self.view.show_state(text)

    def sync_now(self) -> None:
        if not self.url or self.sync_process is not None:
            return
        self.sync_process = self._run(["sync", "--db", str(self.db_path), "--lab", self.url], self._synced)
        self.refresh_state()

    def _synced(self, code: int, out: str, err: str) -> None:
        self.sync_process = None
        self.refresh_state()
        if self.view is not None:
            self.view.show_message((out or err).strip().splitlines()[-1] if (out or err).strip() else "")

    def open_view(self) -> LabWindow:
        if self.view is None:
            self.view = LabWindow(self.url or "", self.window)
            self.view.url_saved.connect(self.save_url)
            self.view.sync_requested.connect(self.sync_now)
            self.view.refresh_requested.connect(self.read_lab)
            self.view.animal_requested.connect(self.read_animal)
            self.view.finished.connect(self._view_closed)
        self.refresh_state()
        self.view.show()
        self.read_lab()
        return self.view

    def _view_closed(self) -> None:
        self.view = None

    def save_url(self, url: str) -> None:
        from monitor.app.settings import set_lab_url

        try:
            set_lab_url(self.settings_file, url)
        except (OSError, ValueError) as exc:
            if self.view is not None:
                self.view.show_message(f"Not saved: {exc}")
            return
        if self.view is not None:
            self.view.show_message(f"Saved in {self.settings_file}.")
        self._set_url(url)

    def read_lab(self) -> None:
        if not self.url or self.show_process is not None:
            if self.view is not None and not self.url:
                self.view.show_message("Set the lab's URL first.")
            return
        self.show_process = self._run(["lab", "show", "--json", "--lab", self.url], self._shown)

    def _shown(self, code: int, out: str, err: str) -> None:
        self.show_process = None
        if self.view is None:
            return
        if code == 0:
            self.view.show_lab(json.loads(out))
        else:
            self.view.show_message(err.strip() or f"rigside lab show ended with {code}")

    def read_animal(self, animal: str) -> None:
        """Open the animal's pages from the lab, read-only (monitor.app.window.lab_pages, read off the GUI thread)."""
        if not self.url:
            return
        if self.pages is None:
            from monitor.app.window.lab_pages import LabPages
            from monitor.app.settings import care_config

            try:
                config = care_config(self.settings_file if self.settings_file.exists() else None)
            except ValueError as exc:
                self._say(f"Settings: {exc}")
                return
            self.pages = LabPages(self, config, self._say)
        self.pages.open(self.url, animal)

    def _say(self, message: str) -> None:
        if self.view is not None:
            self.view.show_message(message)

    def _run(self, args: list[str], done) -> QProcess:
        process = QProcess(self)
        process.finished.connect(lambda code, _status: done(
            code, bytes(process.readAllStandardOutput()).decode("utf-8", "replace"),
            bytes(process.readAllStandardError()).decode("utf-8", "replace")))
        process.start(sys.executable, ["-m", "monitor.app", *args])
        return process

    def stop(self) -> None:
        """Stop the timer; kill a sync still running (the next one resumes where it stopped)."""
        self.timer.stop()
        if self.pages is not None:
            self.pages.stop()
        for process in (self.sync_process, self.show_process):
            if process is not None and process.state() != QProcess.ProcessState.NotRunning:
                process.kill()
                process.waitForFinished(3000)
