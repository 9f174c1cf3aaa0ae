"""The window's manipulations and effects: the dialog on the animal page and the cohort effects window.

Rule: "Record a manipulation…" reads the animal's sessions (report indexes,
start, stage) in a worker, shows the dialog, and stores a valid request
through the store writer with monitor.app.services.effects' `record_manipulation` (the
same function as `rigside manipulation add`). "Cohort effects…" computes
`effects` for all cohorts and for each one from a read-only connection in a
worker and shows the cohort view.
Results and refusals go to the status bar; nothing here judges. Advisory.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any, Callable

from PySide6.QtCore import QObject, Qt
from PySide6.QtWidgets import QWidget

from monitor.app.store_access import read_job


def session_choices(conn: Any, animal: str) -> list[tuple[int, str]]:
    """(report index, "N · start · stage") of the animal's sessions, in order."""
    from monitor.store.manipulations import report_sessions

    return [(i, f"{i} · {start[:16].replace('T', ' ')}" + (f" · {stage}" if stage else "")
             + (" · excluded" if excluded else ""))
            for i, (_, excluded, _, _, start, stage, _) in enumerate(report_sessions(conn, animal), start=1)]


class EffectsSide(QObject):
    """Manipulation entry and the cohort effects window, wired to a Controller (GUI thread only)."""

    def __init__(self, controller) -> None:
        super().__init__(controller)
        self.controller = controller
        self.shown: QWidget | None = None

    def attach(self, window) -> None:
        window.manipulation_requested.connect(self.open_dialog)
        window.effects_requested.connect(self.open_effects)

    def _window(self):
        return self.controller.window

    def _say(self, message: str) -> None:
        if self._window() is not None:
            self._window().statusBar().showMessage(message, 15000)

    def _read(self, fn: Callable[[Any], Any]) -> Callable[[Any], Any]:
        return read_job(Path(self.controller.writer.path), fn)

    def _show(self, widget: QWidget) -> QWidget:
        widget.setAttribute(Qt.WidgetAttribute.WA_DeleteOnClose)
        self.shown = widget
        widget.show()
        return widget

    def open_dialog(self, animal: str) -> None:
        if not animal:
            self._say("Open an animal's page first to record a manipulation.")
            return
        from monitor.ui.manipulation_dialog import ManipulationDialog

        def show(sessions: list[tuple[int, str]]) -> None:
            window = self._window()
            operator = window.alert_panel.operator.text().strip() if window is not None else ""
            dialog = ManipulationDialog(animal, sessions, operator, window)
            dialog.submitted.connect(self.record)
            self._show(dialog)

        self.controller.run_job(f"sessions of {animal}", self._read(lambda c: session_choices(c, animal)), show)

    def record(self, request) -> None:
        """Store the request through the store writer; say the entry (or why not) in the status bar."""
        from monitor.app.services.effects import record_manipulation

        def write(conn):
            return record_manipulation(conn, animal=request.animal, duration=request.duration, role=request.role,
                                       what=request.what, session=request.session,
                                       control_session=request.control_session, group=request.group,
                                       operator=request.operator, reason=request.reason, refresh_report=False)

        def done(entry) -> None:
            m = entry.manipulation
            self._say(f"Manipulation entry {entry.seq} recorded: {m.animal} {m.duration} {m.role} '{m.what}'; "
                      "its sessions are now kept out of curves and fits.")

        self.controller.run_job(f"recording the manipulation of {request.animal}",
                                lambda job: self.controller.writer.call(write), done)

    def open_effects(self) -> None:
        from monitor.app.services.effects import effects
        from monitor.ui.effects_view import EffectsView

        def read(conn) -> tuple[dict[str, Any], dict[str, dict[str, Any]]]:
            document = effects(conn)
            names = sorted({r["cohort"] for r in document["manipulations"] if r.get("cohort")})
            return document, {name: effects(conn, name) for name in names}

        def show(documents: tuple[dict[str, Any], dict[str, dict[str, Any]]]) -> None:
            view = EffectsView(documents[0], self._window(), cohorts=documents[1])
            view.setWindowFlag(Qt.WindowType.Window, True)
            view.resize(1100, 720)
            self._show(view)

        self.controller.run_job("cohort effects", self._read(read), show)
