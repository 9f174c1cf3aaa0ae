"""The animals window wired to a real store: a new animal added from the window is in the store with its change
log and joins the check-in list; a refused value is shown in the window and nothing is written."""

from __future__ import annotations

from monitor.app.window.animal_window import AnimalRecordsSide
from monitor.store.animals import changes_of, get_animal
from monitor.store.db import open_store


class Writer:
    """The store writer's `call`: fn(conn) in one transaction."""

    def __init__(self, conn) -> None:
        self.conn = conn

    def call(self, fn):
        with self.conn:
            return fn(self.conn)


class Controller:
    """What the side uses of the app's controller; jobs run at once."""

    def __init__(self, conn) -> None:
        self.writer = Writer(conn)
        self.window = None
        self.recorded_animals: set[str] = set()
        self.roster_refreshed = 0

    def run_job(self, title, work, done):
        done(work(None))

    def refresh_roster(self) -> None:
        self.roster_refreshed += 1


def test_add_from_the_window_then_a_refusal_in_place(qtbot, tmp_path):
    conn = open_store(tmp_path / "store.sqlite3")
    controller = Controller(conn)
    side = AnimalRecordsSide(controller)
    window = side.open("cedar")
    qtbot.addWidget(window)
    window.operator.setText("Kim, Bo")
    window.inputs["species"].setCurrentText("Rattus norvegicus")
    window.inputs["date_of_birth"].setText("2025-11-02")
    window.save_button.click()
    assert get_animal(conn, "cedar")["date_of_birth"] == "2025-11-02"
    assert [c["field"] for c in changes_of(conn, "cedar")] == ["created", "species", "date_of_birth"]
    assert "cedar" in controller.recorded_animals and controller.roster_refreshed == 1
    assert window.table.rowCount() == 1 and window.history.count() == 3
    window.inputs["species"].setCurrentText("rat")
    window.save_button.click()
    assert window.error.text().startswith("species: expected a binomial name")
    assert get_animal(conn, "cedar")["species"] == "Rattus norvegicus"
    conn.close()


def test_retire_and_edit_from_the_window(qtbot, tmp_path, monkeypatch):
    from PySide6.QtWidgets import QInputDialog

    conn = open_store(tmp_path / "store.sqlite3")
    controller = Controller(conn)
    side = AnimalRecordsSide(controller)
    window = side.open("")
    qtbot.addWidget(window)
    window.start_new("elm")
    window.operator.setText("Kim, Bo")
    window.inputs["sex"].setCurrentIndex(window.inputs["sex"].findData("F"))
    window.save_button.click()
    window.table.selectRow(0)
    assert window.name.text() == "elm" and window.save_button.text() == "Save changes"
    window.inputs["strain"].setText("Wistar")
    window.save_button.click()
    assert get_animal(conn, "elm")["strain"] == "Wistar"
    monkeypatch.setattr(QInputDialog, "getText", lambda *a, **k: ("moved to another study", True))
    window.table.selectRow(0)
    window.retire_button.click()
    assert get_animal(conn, "elm")["retired_reason"] == "moved to another study"
    assert window.table.item(0, 8).text().startswith("retired ")
    assert [c["field"] for c in changes_of(conn, "elm")][-3:] == ["strain", "retired_at", "retired_reason"]
    conn.close()
