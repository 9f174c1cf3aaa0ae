"""The window's worker jobs: work off the GUI thread, results back on it, progress and cancel in the status bar.

Rule: `run_job(title, work, done)` runs `work(job)` in a daemon thread; its
result goes to `done` on the GUI thread through the inbox that the
controller's tick drains (`drain`), so no worker ever touches Qt. A job
reports progress with `job.progress(fraction, words)`, which raises
`Cancelled` once the user pressed Cancel; a failure or a cancel is one line
in the status bar, never swallowed. While any job runs, the status bar shows
the latest one's title, a percentage bar and a Cancel button.
"""

from __future__ import annotations

import queue
import threading
from collections.abc import Callable
from typing import Any

from PySide6.QtCore import Qt
from PySide6.QtWidgets import QLabel, QProgressBar, QPushButton


class Cancelled(Exception):
    """A worker job was cancelled."""


class Job:
    """A worker's handle: report progress, check for cancel (any thread)."""

    def __init__(self, title: str, post: Callable[[Callable[[], None]], None],
                 on_progress: Callable[[str, float, str], None]) -> None:
        self.title = title
        self._post, self._on_progress = post, on_progress
        self.cancel_event = threading.Event()

    def progress(self, fraction: float, message: str = "") -> None:
        if self.cancel_event.is_set():
            raise Cancelled()
        self._post(lambda: self._on_progress(self.title, fraction, message))

    def cancelled(self) -> bool:
        return self.cancel_event.is_set()


class Jobs:
    """The running jobs and the inbox of callables for the GUI thread."""

    def __init__(self) -> None:
        self._inbox: queue.SimpleQueue[Callable[[], None]] = queue.SimpleQueue()
        self._jobs: list[Job] = []
        self.window = None
        self.progress_bar: QProgressBar | None = None
        self.progress_label: QLabel | None = None
        self.cancel_button: QPushButton | None = None

    def attach(self, window) -> None:
        """Put the progress label, bar and Cancel button into the window's status bar (hidden until a job runs)."""
        self.window = window
        self.progress_label = QLabel()
        self.progress_label.setTextFormat(Qt.TextFormat.PlainText)
        self.progress_bar = QProgressBar()
        self.progress_bar.setFixedWidth(120)
        self.progress_bar.setRange(0, 100)
        self.progress_bar.setFormat("%p %")
        self.cancel_button = QPushButton("Cancel")
        self.cancel_button.setToolTip("Cancel the work in progress")
        self.cancel_button.clicked.connect(self.cancel_all)
        for widget in (self.progress_label, self.progress_bar, self.cancel_button):
            window.statusBar().addPermanentWidget(widget)
            widget.hide()

    def post(self, fn: Callable[[], None]) -> None:
        """Run `fn` on the GUI thread at the next tick (any thread)."""
        self._inbox.put(fn)

    def drain(self) -> None:
        """Run every callable posted so far (GUI thread)."""
        while True:
            try:
                self._inbox.get_nowait()()
            except queue.Empty:
                break

    def run_job(self, title: str, work: Callable[[Job], Any], done: Callable[[Any], None],
                failed: Callable[[], None] | None = None) -> Job:
        """Run `work(job)` in a worker thread; `done(result)` then runs on the GUI thread."""
        job = Job(title, self.post, self._show_progress)
        self._jobs.append(job)

        def run() -> None:
            try:
                result = work(job)
            except Cancelled:
                self.post(lambda: self._job_over(job, f"{title}: cancelled", failed))
                return
            except Exception as exc:  # noqa: BLE001 - shown in the status bar, never swallowed
                message = f"{title} failed: {type(exc).__name__}: {exc}"
                self.post(lambda: self._job_over(job, message, failed))
                return
            self.post(lambda: (self._job_over(job, "", None), done(result)))

        threading.Thread(target=run, name=title, daemon=True).start()
        return job

    def _job_over(self, job: Job, message: str, failed: Callable[[], None] | None) -> None:
        if job in self._jobs:
            self._jobs.remove(job)
        if failed is not None:
            failed()
        if self.window is not None:
            if message:
                self.window.statusBar().showMessage(message, 10000)
            if not self._jobs and self.progress_bar is not None:
                for widget in (self.progress_label, self.progress_bar, self.cancel_button):
                    widget.hide()

    def _show_progress(self, title: str, fraction: float, message: str) -> None:
        if self.progress_bar is None or not any(j.title == title for j in self._jobs):
            return
        self.progress_bar.setValue(int(round(100 * min(max(fraction, 0.0), 1.0))))
        self.progress_label.setText(title)
        self.progress_label.setToolTip(message)
        for widget in (self.progress_label, self.progress_bar, self.cancel_button):
            widget.show()

    def cancel_all(self) -> None:
        for job in self._jobs:
            job.cancel_event.set()

    def titles(self) -> list[str]:
        """The titles of the jobs still running."""
        return [j.title for j in self._jobs]
