"""The window's File menu: importing session files and exporting, as window jobs with progress and Cancel.

Rule: the work is the command line's own (`import_files` of `rigside import`,
`export_csv` and `export_nwb_files` of `rigside export`), run through the
controller's `run_job` with a `JobTracker`: the fraction done goes to the
status bar's progress bar, the counts, rate and time left to a line beside
its Cancel button, which asks the work to stop at its next safe point. The work stops there,
having written nothing half-way (one transaction per imported file, a
temporary name for every exported file), and the status bar says what was
finished. An import skips files imported before and refits the imported
animals; an export never overwrites: a CSV gets a name with the time in it.
"""

from __future__ import annotations

import time
from datetime import datetime
from pathlib import Path
from collections.abc import Callable
from typing import Any

from PySide6.QtCore import QObject, Qt, Signal
from PySide6.QtWidgets import QLabel

from monitor.app.window.jobs import Cancelled, Job

SHOW_S = 0.1       # at most ten progress updates a second
MESSAGE_MS = 30000  # how long the closing line stays in the status bar


class JobTracker:
    """A `Tracker` (monitor.app.progress) over a window job: progress to the status bar, Cancel as the stop."""

    def __init__(self, job: Job, show: Callable[[str], None] | None = None) -> None:
        self.job = job
        self.show = show   # the figures line (any thread)
        self.total = self.done = 0
        self.unit = self.label = ""
        self.lines: list[str] = []
        self._started = self._shown = time.monotonic()

    def begin(self, total: int, unit: str, label: str) -> None:
        self.total, self.done, self.unit, self.label = total, 0, unit, label
        self._started = time.monotonic()
        self._show(force=True)

    def advance(self, amount: int = 1) -> None:
        self.done += amount
        self._show()

    def say(self, line: str) -> None:
        self.lines.append(line)

    def cancelled(self) -> bool:
        return self.job.cancelled()

    def figures(self) -> str:
        """`12 of 176 files, 3.2 files/s, about 51 s left` (rate and time left once something is done)."""
        text = f"{self.label}: {self.done:,} of {self.total:,} {self.unit}s"
        seconds = time.monotonic() - self._started
        if self.done and seconds > 0:
            rate = self.done / seconds
            shown = f"{rate:,.0f}" if rate >= 100 else f"{rate:,.1f}"
            text += f", {shown} {self.unit}s/s, about {max(self.total - self.done, 0) / rate:.0f} s left"
        return text

    def _show(self, force: bool = False) -> None:
        now = time.monotonic()
        if not force and now - self._shown < SHOW_S:
            return
        self._shown = now
        figures = self.figures()
        if self.show is not None:
            self.show(figures)
        try:
            self.job.progress(self.done / self.total if self.total else 0.0, figures)
        except Cancelled:  # the work itself stops at its next safe point and says what it finished
            pass


def _export_name(folder: Path, kind: str) -> Path:
    """A CSV name in `folder` that no earlier export holds."""
    return folder / f"rigside-{kind}-{datetime.now().strftime('%Y-%m-%d-%H%M%S')}.csv"


class FileJobs(QObject):
    """File > Import session files… and File > Export…, wired to a Controller (GUI thread only)."""

    figures_changed = Signal(str)   # emitted from the worker; Qt queues it to the GUI thread

    def __init__(self, controller) -> None:
        super().__init__(controller)
        self.controller = controller
        self.last: Any = None   # the last finished job's result
        self.running = 0
        self.figures = QLabel()
        self.figures.setTextFormat(Qt.TextFormat.PlainText)
        self.figures.hide()
        self.figures_changed.connect(self._show_figures)

    def attach(self, window) -> None:
        window.import_chosen.connect(lambda choice: self.start_import(list(choice.files), choice.protocol))
        window.export_chosen.connect(lambda choice: self.start_export(choice.kind, choice.folder))
        window.statusBar().addPermanentWidget(self.figures)

    def _show_figures(self, text: str) -> None:
        if self.running:   # a line queued before the job ended is not shown after it
            self.figures.setText(text)
            self.figures.show()

    def _run(self, title: str, work: Callable[[JobTracker], Any], done: Callable[[Any], None]) -> Job:
        """`work(tracker)` as a window job; the figures line shows while any file job runs."""
        def over() -> None:
            self.running -= 1
            if not self.running:
                self.figures.hide()

        def finished(result: Any) -> None:
            over()
            self.last = result
            done(result)
        self.running += 1
        return self.controller.run_job(title, lambda job: work(JobTracker(job, self.figures_changed.emit)),
                                       finished, over)

    def _db(self) -> Path:
        return Path(self.controller.writer.path)

    def _say(self, message: str) -> None:
        if self.controller.window is not None:
            self.controller.window.statusBar().showMessage(message, MESSAGE_MS)

    def start_import(self, files: list[Path], protocol: Path) -> Job:
        """Import `files` (recorded under `protocol`) as `rigside import --skip-imported` does, then refit their
        animals, and those of skipped files with no fit to their data as they are (unless the window fits no
        models)."""
        from monitor.app.commands.import_files import import_files, refit_animals

        operator = self.controller.operator() or None  # who excludes a grown file's earlier sessions

        def work(tracker: JobTracker):
            result = import_files(self._db(), files, protocol, tracker, skip_imported=True, operator=operator)
            if result.fit_targets and not result.stopped and self.controller.pages.fit_consolidation:
                refit_animals(self._db(), result.fit_targets, tracker)
            return result

        def done(result) -> None:
            skipped = f"; {len(result.skipped)} imported before were skipped" if result.skipped else ""
            if result.stopped:
                last = f" (the last: {result.last})" if result.last else ""
                self._say(f"Import cancelled: {result.imported} of {result.files} files imported{last}, each "
                          f"whole; the other {result.files - result.imported} were not touched (import them "
                          f"again: files already imported are skipped){skipped}.")
            else:
                superseded = (f"; {result.superseded} earlier sessions of files that grew since are now excluded as "
                              "superseded" if result.superseded else "")
                self._say(f"Imported {result.imported} files: {result.sessions} sessions, {result.events:,} events, "
                          f"{result.malformed} malformed lines, in {result.seconds:.1f} s{skipped}{superseded}.")
            self.controller.sessions.load_stored_stages()

        return self._run(f"Importing {len(files)} files", work, done)

    def start_export(self, kind: str, folder: Path) -> Job:
        """Export `kind` (events, trials: a CSV; nwb: a file per session) into `folder`."""
        from monitor.app.commands.export import export_csv, export_nwb_files
        from monitor.app.settings import export_settings, settings_path
        from monitor.store.db import open_store

        def work(tracker: JobTracker):
            conn = open_store(self._db(), readonly=True)
            try:
                if kind == "nwb":
                    return export_nwb_files(conn, folder, export_settings(settings_path(None)), tracker)
                return export_csv(conn, kind, _export_name(folder, kind), tracker)
            finally:
                conn.close()

        def done(result) -> None:
            if kind == "nwb":
                failed = f"; {len(result.failed)} sessions could not be written" if result.failed else ""
                if result.stopped:
                    self._say(f"Export cancelled: {len(result.written)} of {result.total} NWB files written to "
                              f"{folder}, each whole; the others were not written{failed}.")
                else:
                    self._say(f"Exported {len(result.written)} NWB files to {folder} in {result.seconds:.1f} s"
                              f"{failed}.")
            elif result.stopped:
                self._say(f"Export cancelled after {result.rows:,} {kind}: no file was written.")
            else:
                self._say(f"Exported {result.rows:,} {kind} to {result.path} in {result.seconds:.1f} s.")

        title = "Exporting NWB files" if kind == "nwb" else f"Exporting {kind}"
        return self._run(title, work, done)
