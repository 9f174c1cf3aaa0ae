"""The window's side of the subject records: opens the animals window and carries its requests to the store.

Rule: reads and writes go through the controller's worker jobs and its single
store writer (monitor.store.animals, one transaction each), never on the GUI
thread. A refused value comes back as the store's one-line reason and is shown
in the window; nothing is half-written. An animal added here joins the
check-in list at once (the controller's `recorded_animals`): a new name typed
at check-in closes that dialog, opens this window with the name filled in,
and once saved the name is offered at the next check-in.
"""

from __future__ import annotations

from typing import Any

from monitor.ui.animal_records import AnimalEdit, AnimalRecordsWindow


class AnimalRecordsSide:
    """Connects the main window's animal-records requests to the store."""

    def __init__(self, controller) -> None:
        self.controller = controller
        self.window: AnimalRecordsWindow | None = None

    def attach(self, window) -> None:
        window.animals_requested.connect(self.open)

    def open(self, new_name: str = "") -> AnimalRecordsWindow:
        """Show the animals window (a new record for `new_name` when given)."""
        main = self.controller.window
        if self.window is None:
            operator = main.alert_panel.operator.text() if main is not None else ""
            self.window = AnimalRecordsWindow(operator, parent=main)
            self.window.save_requested.connect(self.save)
            self.window.retire_requested.connect(self.retire)
            self.window.selected.connect(self.show_history)
        self.refresh(select=None)
        if new_name:
            self.window.start_new(new_name)
        self.window.show()
        self.window.raise_()
        return self.window

    def refresh(self, select: str | None) -> None:
        from monitor.store.animals import list_animals

        self.controller.run_job("reading animal records", lambda job: self.controller.writer.call(list_animals),
                                lambda records: self._show(records, select))

    def _show(self, records: list[dict[str, Any]], select: str | None) -> None:
        if self.window is not None:
            self.window.set_records(records, select)

    def save(self, edit: AnimalEdit) -> None:
        from monitor.store import animals
        from monitor.store.registry import RecordError

        def write(conn) -> str:
            try:
                if edit.new:
                    animals.add_animal(conn, edit.name, edit.operator, **edit.fields)
                else:
                    animals.edit_animal(conn, edit.name, edit.operator, **edit.fields)
            except RecordError as exc:
                return str(exc)
            return ""

        self._write(f"saving {edit.name}", write, edit.name, added=edit.new)

    def retire(self, name: str, reason: str, operator: str) -> None:
        from monitor.store import animals
        from monitor.store.registry import RecordError

        def write(conn) -> str:
            try:
                animals.retire_animal(conn, name, operator, reason)
            except RecordError as exc:
                return str(exc)
            return ""

        self._write(f"retiring {name}", write, name, added=False)

    def _write(self, title: str, write, name: str, added: bool) -> None:
        def done(error: str) -> None:
            if self.window is not None:
                self.window.show_error(error)
            if error:
                return
            if added:
                self.controller.recorded_animals.add(name)
                self.controller.refresh_roster()
                main = self.controller.window
                if main is not None:
                    main.statusBar().showMessage(f"{name} added: check it in with Rigs → Check in", 15000)
            self.refresh(select=name)
            self.show_history(name)

        self.controller.run_job(title, lambda job: self.controller.writer.call(write), done)

    def show_history(self, name: str) -> None:
        from monitor.store.animals import changes_of

        def lines(changes: list[dict[str, Any]]) -> None:
            if self.window is not None:
                self.window.set_history([f"{c['at']}  {c['by']}  {c['field']}: {c['old'] or '–'} → {c['new'] or '–'}"
                                         for c in changes])

        self.controller.run_job(f"reading {name}'s changes",
                                lambda job: self.controller.writer.call(lambda conn: changes_of(conn, name)), lines)
