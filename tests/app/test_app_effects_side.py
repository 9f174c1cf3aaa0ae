"""The window's manipulation entry (animal page) and cohort effects window, through a real store and writer."""

from __future__ import annotations

import sqlite3
from datetime import datetime, timedelta

import numpy as np
import pytest

from drivers.wire import encode_event, encode_header
from monitor.app import cli
from monitor.app.window.controller import Controller
from monitor.store.writer import StoreWriter
from monitor.ui.effects_view import EffectsView
from monitor.ui.main_window import MainWindow
from monitor.ui.manipulation_dialog import ManipulationDialog

PROTOCOL = """
[protocol]
name = "two-press 650 ms"
version = 1
task = "two_press"
target_ms = 650
tolerance = 0.2
reward_ul = 30
"""


@pytest.fixture
def app(qapp, tmp_path):
    rng = np.random.default_rng(1)
    files = []
    for day in range(5):
        start = (datetime.now().astimezone() - timedelta(days=5 - day)).replace(microsecond=0)
        data = encode_header(clock="ms", start=start.isoformat(timespec="seconds"))
        spread = 0.1 if day < 4 else 0.45        # the last session: intervals scattered, fewer hits
        for k in range(120):
            t = 1000 + 4000 * k
            gap = int(650 * np.exp(rng.normal(0, spread)))
            data += encode_event(t, "lever_down") + encode_event(t + gap, "lever_down")
        files.append(tmp_path / f"heron_s{day + 1:02d}.rsw")
        files[-1].write_bytes(data)
    (tmp_path / "p.toml").write_text(PROTOCOL)
    db = tmp_path / "store.sqlite3"
    assert cli.main(["import", *map(str, files), "--protocol", str(tmp_path / "p.toml"), "--db", str(db),
                     "--no-fit"]) == 0
    writer = StoreWriter(db)
    writer.start()
    controller = Controller(writer, alert_store=None, fit_consolidation=False)
    window = MainWindow(controller.board, controller.book, controller.alert_book)
    controller.attach(window)
    controller.start()
    yield controller, window, db
    controller.close()
    window.close()


def test_record_a_manipulation_from_the_page_and_open_the_cohort_view(app, qtbot, tmp_path):
    controller, window, db = app
    page = window.open_animal("heron")
    window.grab().save(str(tmp_path / "page.png"))
    page.record_buttons["manipulation"].click()
    qtbot.waitUntil(lambda: isinstance(window.findChild(ManipulationDialog), ManipulationDialog), timeout=20000)
    dialog = window.findChild(ManipulationDialog)
    assert dialog.session.count() == 5 and dialog.session.currentData() == 5
    dialog.what.setText("muscimol M1")
    dialog.operator.setText("kim")
    dialog.reason.setText("planned day")
    assert dialog.try_accept()

    def stored() -> int:
        conn = sqlite3.connect(db)
        try:
            return conn.execute("SELECT count(*) FROM manipulations").fetchone()[0]
        finally:
            conn.close()
    qtbot.waitUntil(lambda: stored() == 1, timeout=20000)
    qtbot.waitUntil(lambda: "Manipulation entry 1 recorded" in window.statusBar().currentMessage(), timeout=20000)
    window.actions["effects"].trigger()
    qtbot.waitUntil(lambda: isinstance(window.findChild(EffectsView), EffectsView), timeout=60000)
    view = window.findChild(EffectsView)
    row = view.document["manipulations"][0]
    hit = row["effect"]["vs_baseline"]["hit_rate"]
    assert row["effect"]["baseline_sessions"] == [2, 3, 4] and hit["high"] < 0
    assert "1 manipulation(s) without a slow-state estimate" in view.note.text()   # no fit: in the table only
    view.grab().save(str(tmp_path / "cohort.png"))
