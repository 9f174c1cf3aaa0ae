"""The window's lab link: status words, the settings file's [lab] url, and a background sync against a real
PostgreSQL in a separate process (the status bar, the read-only lab view and an animal's page afterwards)."""

from __future__ import annotations

import tomllib
from pathlib import Path

import pytest

from mock_rig.history import cohort, write_history
from monitor.app.cli import main
from monitor.app.window.lab_background import LabLink, status_text
from monitor.app.settings import lab_url as configured_url, set_lab_url

SHOTS = Path("/tmp/rigside-shots")


def test_status_words():
    assert status_text(None, False, None) == "lab: not set"
    assert status_text(None, True, "postgresql://x/y") == "lab: syncing…"
    state = {"rows_waiting": 12, "unreachable_since": "2026-03-02T09:10:00Z", "last_error": "down",
             "last_sync_at": "2026-03-02T08:00:00Z"}
    assert status_text(state, False, "postgresql://x/y") == "lab: unreachable since 2026-03-02 09:10 UTC, 12 waiting"
    state.update(unreachable_since=None, last_error=None, rows_waiting=0)
    assert status_text(state, False, "postgresql://x/y") == "lab: synced 2026-03-02 08:00 UTC, 0 waiting"
    state.update(last_error="animal 'alder' is on room-b and on room-a, and no lab id tells them apart: give it a "
                            "lab id on each PC", rows_waiting=40)
    text = status_text(state, False, "postgresql://x/y")
    assert text.startswith("lab: not synced (animal 'alder' is on room-b") and text.endswith("…), 40 waiting")


def test_the_settings_file_keeps_everything_else(tmp_path, monkeypatch):
    monkeypatch.delenv("RIGSIDE_LAB", raising=False)
    path = tmp_path / "settings.toml"
    path.write_text('[care]\nmin_daily_ml = 10.0  # keep\n\n[lab]\nurl = "postgresql://old@h/db"\n', encoding="utf-8")
    set_lab_url(path, 'postgresql://new@h/db?options=-csearch_path%3D"x"')
    doc = tomllib.loads(path.read_text(encoding="utf-8"))  # reference: Python's own TOML reader
    assert doc["care"] == {"min_daily_ml": 10.0} and doc["lab"]["url"] == 'postgresql://new@h/db?options=-csearch_path%3D"x"'
    assert "# keep" in path.read_text(encoding="utf-8")
    assert configured_url(None, path) == doc["lab"]["url"]
    fresh = tmp_path / "new" / "settings.toml"
    set_lab_url(fresh, "postgresql://a@b/c")
    assert tomllib.loads(fresh.read_text(encoding="utf-8")) == {"lab": {"url": "postgresql://a@b/c"}}
    set_lab_url(fresh, "")
    assert configured_url(None, fresh) is None
    monkeypatch.setenv("RIGSIDE_LAB", "postgresql://env@h/db")
    assert configured_url(None, path) == "postgresql://env@h/db" and configured_url("postgresql://given@h/db", path).startswith(
        "postgresql://given")


@pytest.fixture
def store(tmp_path) -> Path:
    write_history(tmp_path / "h", cohort(1, seed=5), days=2)
    db = tmp_path / "pc.sqlite3"
    files = sorted((tmp_path / "h").glob("alder_s*.rsw"))
    assert main([*map(str, ["import", *files, "--protocol", tmp_path / "h" / "alder.protocol.toml", "--db", db,
                            "--no-fit"])]) == 0
    return db


@pytest.mark.slow  # a sync in a child process, then the lab view
def test_background_sync_and_the_lab_view(qtbot, store, lab_url, tmp_path):
    from PySide6.QtWidgets import QMainWindow

    assert main(["lab", "init", "--lab", lab_url]) == 0
    window = QMainWindow()
    qtbot.addWidget(window)
    window.resize(900, 300)
    link = LabLink(window, store, tmp_path / "settings.toml", None)
    assert link.label.text() == "lab: not set"
    view = link.open_view()
    view.url.setText(lab_url)
    view.url_saved.emit(lab_url)  # "Save for this PC": written to the settings file, then a sync starts
    assert lab_url_in(tmp_path / "settings.toml") == lab_url
    qtbot.waitUntil(lambda: link.sync_process is None and link.label.text().startswith("lab: synced"),
                    timeout=120_000)
    assert link.label.text().endswith(", 0 waiting")
    link.read_lab()
    qtbot.waitUntil(lambda: view.pcs.rowCount() == 1, timeout=120_000)
    assert view.animals.item(0, 0).text() == "alder" and view.pcs.item(0, 4).text() == "1"
    view.animals.cellDoubleClicked.emit(0, 0)  # the animal's page, read from the lab (tests/app/test_app_lab_pages.py)
    qtbot.waitUntil(lambda: link.pages is not None and "alder" in link.pages.windows, timeout=120_000)
    assert link.pages.windows["alder"].page.sessions.table.rowCount() == 2  # the 2 days written above
    SHOTS.mkdir(exist_ok=True)
    view.grab().save(str(SHOTS / "lab-view.png"))
    window.grab().save(str(SHOTS / "lab-status.png"))
    link.stop()


def lab_url_in(path: Path) -> str:
    return tomllib.loads(path.read_text(encoding="utf-8"))["lab"]["url"]
