"""monitor.app.window.controller: a file source through the Fanout, store and engine to the owners (offscreen)."""

from __future__ import annotations

import datetime as dt
import json
import sqlite3
import threading

import pytest

from monitor.app.rigs import RigSpec
from monitor.app.window.controller import Controller
from monitor.store.writer import StoreWriter
from monitor.ui.main_window import MainWindow
from monitor.ui.models import CheckIn, Severity
from fixtures.protocols import protocol_toml
from fixtures.sessions import params_bytes, session_bytes

pytestmark = pytest.mark.slow  # windows, subprocesses or simulated histories: seconds per test

PROTOCOL_TEXT = protocol_toml(plateau_sessions=3, min_trials=5)


class RecordingAlertStore:
    def __init__(self) -> None:
        self.saved, self.acks = [], []
        self.lock = threading.Lock()

    def save(self, alert) -> None:
        with self.lock:
            self.saved.append(alert)

    def acknowledge(self, alert_id, operator, when) -> None:
        with self.lock:
            self.acks.append((alert_id, operator, when))


@pytest.fixture
def rig(qapp, tmp_path):
    protocol = tmp_path / "p.toml"
    protocol.write_text(PROTOCOL_TEXT)
    log = tmp_path / "box1.rsw"
    log.write_bytes(b"")
    writer = StoreWriter(tmp_path / "t.sqlite3")
    writer.start()
    store = RecordingAlertStore()
    controller = Controller(writer, alert_store=store, fit_consolidation=False)
    window = MainWindow(controller.board, controller.book, controller.alert_book)
    controller.attach(window)
    controller.add_rig(RigSpec("box 1", "file", str(log), protocol))
    controller.start()
    yield controller, window, log, store, tmp_path / "t.sqlite3"
    controller.close()
    window.close()


def sessions_in(db):
    with sqlite3.connect(db) as conn:     # plain sqlite3, not the store's code
        return conn.execute("SELECT animal, rig, ended_at IS NOT NULL FROM sessions ORDER BY id").fetchall()


def test_check_in_trials_reach_the_tile_and_check_out_ends_the_session(rig, qtbot):
    controller, window, log, store, db = rig
    controller.check_in(CheckIn("wren", "box 1", "ana", 301.0, "main"))
    qtbot.waitUntil(lambda: controller.rigs["box 1"].session_id is not None, timeout=10000)
    intervals = [650, 700, 1000, 640, 300, 655]
    with log.open("ab") as fh:
        fh.write(session_bytes(intervals, valve_ms=900))
    qtbot.waitUntil(lambda: (controller.board.state("box 1") or None) is not None
                    and controller.board.state("box 1").trials_today == 6, timeout=10000)
    tile = controller.board.state("box 1")
    assert tile.animal == "wren" and tile.source_text == str(log)
    # the valve rule fired once, shows on the tile, and went to the alert store
    qtbot.waitUntil(lambda: controller.board.state("box 1").alert_count == 1, timeout=5000)
    assert controller.board.state("box 1").alert_severity is Severity.URGENT
    alert = [a for a in controller.alert_book.alerts() if a.rig == "box 1"][0]   # care alerts are the animal's
    assert alert.kind == "valve open too long"
    qtbot.waitUntil(lambda: len([a for a in store.saved if a.rig == "box 1"]) == 1, timeout=5000)
    assert controller.alert_book.acknowledge(alert.id, "ana")
    qtbot.waitUntil(lambda: len(store.acks) == 1, timeout=5000)
    assert store.acks[0][:2] == (alert.id, "ana") and isinstance(store.acks[0][2], dt.datetime)
    qtbot.waitUntil(lambda: controller.board.state("box 1").alert_count == 0, timeout=5000)
    # a quiet tick changes nothing on the board
    changed = []
    controller.board.rig_changed.connect(changed.append)
    controller.refresh()
    controller.refresh()
    assert len(changed) <= 1                      # at most the session clock's next second
    controller.check_out("box 1")
    qtbot.waitUntil(lambda: ("wren", "box 1", 1) in sessions_in(db), timeout=10000)
    qtbot.waitUntil(lambda: controller.board.state("box 1").animal is None, timeout=5000)
    assert controller.board.state("box 1").connection.word == "idle"


def test_history_comes_from_the_store_when_the_page_opens(rig, qtbot):
    controller, window, log, store, db = rig
    controller.check_in(CheckIn("wren", "box 1", "ana", 301.0, "main"))
    qtbot.waitUntil(lambda: controller.rigs["box 1"].session_id is not None, timeout=10000)
    with log.open("ab") as fh:
        fh.write(session_bytes([650, 660, 640, 1000, 655]))
    qtbot.waitUntil(lambda: controller.board.state("box 1").trials_today == 5, timeout=10000)
    qtbot.waitUntil(lambda: controller.writer.status().committed_events > 0 and
                    controller.writer.status().pending_rows == 0, timeout=10000)
    controller.check_out("box 1")
    qtbot.waitUntil(lambda: ("wren", "box 1", 1) in sessions_in(db), timeout=10000)
    with sqlite3.connect(db) as conn:               # the store derived the session's trials at check-out
        assert conn.execute("SELECT count(*) FROM trials").fetchone()[0] == 5
    controller.history_parts.clear()
    window.open_animal("wren")
    qtbot.waitUntil(lambda: "wren" in controller.history_parts, timeout=20000)
    rows = controller.history_parts["wren"].sessions
    assert [(r.trials, r.hits, r.rig) for r in rows] == [(5, 4, "box 1")]
    page = controller.book.state("wren")
    assert page is not None and page.curve is controller.history_parts["wren"].curve
    from monitor.ui.models import Exclusion         # an exclusion from the page goes to the store
    window.alert_panel.operator.setText("ana")
    controller.pages.exclude(Exclusion("wren", 1, "cable fault"))
    qtbot.waitUntil(lambda: "wren" in controller.history_parts and
                    controller.history_parts["wren"].sessions[0].excluded, timeout=20000)
    assert controller.history_parts["wren"].sessions[0].exclusion_reason == "cable fault"


def fits_in(db) -> list[str]:
    with sqlite3.connect(db) as conn:     # plain sqlite3, not the store's code
        return [json.loads(b)["status"] for (b,) in conn.execute("SELECT block FROM fits ORDER BY id")]


def test_check_out_refits_in_a_child_process_and_unchanged_data_are_not_refitted(rig, qtbot, monkeypatch):
    controller, window, log, store, db = rig
    controller.pages.fit_consolidation = True
    spawned = []
    import monitor.store.consolidation_fits as fits_module
    real = fits_module.refit_in_process
    monkeypatch.setattr(fits_module, "refit_in_process", lambda *a, **k: (spawned.append(a[1]), real(*a, **k))[1])
    controller.check_in(CheckIn("wren", "box 1", "ana", 301.0, "main"))
    qtbot.waitUntil(lambda: controller.rigs["box 1"].session_id is not None, timeout=10000)
    with log.open("ab") as fh:
        fh.write(session_bytes([650, 660, 640, 1000, 655]))
    qtbot.waitUntil(lambda: controller.board.state("box 1").trials_today == 5, timeout=10000)
    controller.check_out("box 1")
    qtbot.waitUntil(lambda: ("wren", "box 1", 1) in sessions_in(db), timeout=10000)
    # check-out derives the session's trials, then refits (the data changed): let that finish first
    qtbot.waitUntil(lambda: spawned and not controller.jobs.titles() and "wren" not in controller.pages.loading, timeout=60000)
    assert all(names == ["wren"] for names in spawned)
    fitted = fits_in(db)
    assert fitted[-1] == "too few trials"          # five trials: far below the estimator's minimum
    spawned.clear()
    controller.history_parts.clear()
    window.open_animal("wren")
    # the page shows the cached fit
    qtbot.waitUntil(lambda: "wren" in controller.history_parts and "wren" not in controller.pages.loading, timeout=60000)
    assert fits_in(db) == fitted
    assert spawned == []                            # opening the page used the fit cached at check-out
    assert "too few trials" in controller.book.state("wren").consolidation.model_comparison
    controller.load_history("wren", refresh=True)   # same data: the cached fit is current, no new process
    qtbot.waitUntil(lambda: "wren" not in controller.pages.loading, timeout=20000)
    assert spawned == [] and fits_in(db) == fitted


def test_long_work_shows_progress_and_can_be_cancelled(rig, qtbot):
    controller, window, *_ = rig
    started = threading.Event()

    def work(job):
        started.set()
        while True:
            job.progress(0.5, "waiting")
            job.cancel_event.wait(0.05)

    controller.run_job("a long job", work, lambda result: None)
    qtbot.waitUntil(lambda: controller.jobs.progress_bar.isVisibleTo(window), timeout=5000)
    assert controller.jobs.progress_bar.value() == 50 and controller.jobs.progress_label.text() == "a long job"
    controller.jobs.cancel_all()
    qtbot.waitUntil(lambda: controller.jobs.titles() == [], timeout=5000)
    assert "cancelled" in window.statusBar().currentMessage()
    assert not controller.jobs.progress_bar.isVisibleTo(window)


def test_a_failing_job_is_shown_not_swallowed(rig, qtbot):
    controller, window, *_ = rig
    controller.run_job("a broken job", lambda job: 1 / 0, lambda result: None)
    qtbot.waitUntil(lambda: "ZeroDivisionError" in window.statusBar().currentMessage(), timeout=5000)


def test_alerts_go_to_the_stores_alerts_table(qapp, tmp_path, qtbot):
    from monitor.app.live.engine import RaisedAlert
    from monitor.core.alerts import URGENT, Raised
    writer = StoreWriter(tmp_path / "a.sqlite3")
    writer.start()
    controller = Controller(writer, fit_consolidation=False)
    try:
        alert = controller.alerts.push(RaisedAlert("box 1", "wren", Raised("lever held", URGENT, "held"), 1.7e9))
        controller.alert_book.acknowledge(alert.id, "ana")

        def row():
            with sqlite3.connect(tmp_path / "a.sqlite3") as conn:
                return conn.execute("SELECT rig, kind, level, message, acknowledged_by FROM alerts").fetchall()
        qtbot.waitUntil(lambda: row() == [("box 1", "lever held", "urgent", "held", "ana")], timeout=10000)
        assert controller.alerts.errors == []
    finally:
        controller.close()


STAGED_TEXT = PROTOCOL_TEXT.replace("[plateau]", """[[stages]]
name = "wide"
tolerance = 0.5

[[stages]]
name = "final"

[plateau]""")


def test_params_sent_before_check_in_are_the_sessions_and_the_box_names_the_stage(rig, qtbot):
    controller, window, log, store, db = rig
    protocol = log.with_name("staged.toml")
    protocol.write_text(STAGED_TEXT)
    box2 = log.with_name("box2.rsw")
    box2.write_bytes(params_bytes(("stage", "final"), ("window_low_ms", "220"), ("window_high_ms", "660")))
    controller.add_rig(RigSpec("box 2", "file", str(box2), protocol))
    # nobody checked in yet: a new animal defaults to the protocol's first stage, unless the box said its own
    qtbot.waitUntil(lambda: controller.rigs["box 2"].snapshot is not None
                    and len(controller.rigs["box 2"].snapshot.params) == 3, timeout=10000)
    roster = controller.roster()
    assert roster.stages == ("main", "wide", "final")                  # training order, not alphabetical
    assert roster.default_stage("newt", "box 2") == "final"            # what the box sent
    assert roster.default_stage("newt", "box 1") == "main"             # the first stage of box 1's protocol
    controller.check_in(CheckIn("newt", "box 2", "ana", 301.0, "wide"))
    qtbot.waitUntil(lambda: controller.rigs["box 2"].session_id is not None, timeout=10000)
    qtbot.waitUntil(lambda: (controller.board.state("box 2") or None) is not None
                    and controller.board.state("box 2").window_low_ms == 220.0, timeout=10000)
    assert controller.board.state("box 2").window_high_ms == 660.0
    session_id = controller.rigs["box 2"].session_id
    qtbot.waitUntil(lambda: controller.writer.status().pending_rows == 0, timeout=10000)
    with sqlite3.connect(db) as conn:     # plain sqlite3: the session's own record holds the params in force
        stored = conn.execute("SELECT c.name, e.value FROM events e JOIN event_codes c ON c.code = e.code "
                              "WHERE e.session_id = ? ORDER BY e.rowid", (session_id,)).fetchall()
        stage = conn.execute("SELECT stage FROM sessions WHERE id = ?", (session_id,)).fetchone()[0]
    assert stored[:3] == [("param", "stage final"), ("param", "window_low_ms 220"), ("param", "window_high_ms 660")]
    assert stage == "final"
    controller.check_out("box 2")
    # the animal's next check-in, in a box that says nothing, defaults to its current stage
    assert controller.roster().default_stage("newt", "box 1") == "final"


def test_a_box_running_with_nobody_checked_in_is_flagged_and_its_trials_given_afterwards(rig, qtbot):
    from monitor.ui.models import Connection, UnattendedGift

    controller, window, log, store, db = rig
    with log.open("ab") as fh:
        fh.write(session_bytes([650, 700, 640, 1000, 655]))
    qtbot.waitUntil(lambda: (controller.board.state("box 1") or None) is not None
                    and controller.board.state("box 1").connection is Connection.UNATTENDED, timeout=10000)
    assert controller.board.state("box 1").unattended_presses == 15          # 5 trial starts + 10 presses
    qtbot.waitUntil(lambda: any(a.kind == "nobody checked in" for a in controller.alert_book.alerts()), timeout=5000)
    qtbot.waitUntil(lambda: controller.writer.status().pending_rows == 0, timeout=10000)
    old = controller.rigs["box 1"].idle_session_id
    controller.give_unattended(UnattendedGift("box 1", "newt", "ana", "checked in late"))
    qtbot.waitUntil(lambda: ("newt", "box 1", 1) in sessions_in(db), timeout=10000)
    qtbot.waitUntil(lambda: controller.board.state("box 1").connection is not Connection.UNATTENDED, timeout=10000)
    with sqlite3.connect(db) as conn:     # plain sqlite3, not the store's code
        assert conn.execute("SELECT count(*) FROM trials WHERE session_id = ?", (old,)).fetchone()[0] == 5
        assert conn.execute("SELECT change, animal, operator, reason FROM session_changes WHERE session_id = ?",
                            (old,)).fetchall() == [("given", "newt", "ana", "checked in late")]
    assert controller.rigs["box 1"].idle_session_id != old
    # the box's next data go to a fresh run of no animal
    with log.open("ab") as fh:
        fh.write(session_bytes([650, 700], start_ms=60_000).split(b"\n", 1)[1])
    qtbot.waitUntil(lambda: controller.board.state("box 1").unattended_presses == 6, timeout=10000)


def test_check_out_records_who_confirmed_it(rig, qtbot):
    from monitor.ui.models import CheckOut

    controller, window, log, store, db = rig
    controller.check_in(CheckIn("wren", "box 1", "ana", 301.0, "main"))
    qtbot.waitUntil(lambda: controller.rigs["box 1"].session_id is not None, timeout=10000)
    session_id = controller.rigs["box 1"].session_id
    controller.check_out(CheckOut("box 1", "wren", "bo"))
    qtbot.waitUntil(lambda: ("wren", "box 1", 1) in sessions_in(db), timeout=10000)
    with sqlite3.connect(db) as conn:     # plain sqlite3, not the store's code
        assert conn.execute("SELECT operator, checked_out_by FROM checkins WHERE session_id = ?",
                            (session_id,)).fetchone() == ("ana", "bo")


def test_the_pages_measures_are_the_eligibility_figures_once_judged(rig, qtbot):
    from monitor.core.eligibility.figures import AnimalFigures

    controller, window, log, store, db = rig
    controller.check_in(CheckIn("wren", "box 1", "ana", 301.0, "main"))
    qtbot.waitUntil(lambda: controller.rigs["box 1"].session_id is not None, timeout=10000)
    window.open_animal("wren")
    qtbot.waitUntil(lambda: "wren" in controller.history_parts, timeout=20000)
    figures = AnimalFigures(animal="wren", protocol_name="p", protocol_version=1, session=7, plateau_reached=True,
                            plateau_session=3, sessions_since_plateau=4, trials_since_plateau=321,
                            measures={"interval_error": 0.281, "cv": 0.229})
    controller.decisions_and_care.figures["wren"] = figures
    controller.pages.push("wren")
    shown = controller.book.state("wren").consolidation
    assert (shown.interval_error, shown.cv, shown.sessions_since_plateau, shown.trials_since_plateau,
            shown.measures_session) == (0.281, 0.229, 4, 321, 7)
    controller.pages.push("wren")
    assert controller.book.state("wren").consolidation is shown           # unchanged: no redraw


def test_the_page_shows_this_sessions_fraction_followed_by_the_engine(rig, qtbot):
    import numpy as np

    from monitor.core.consolidation.live import LiveFilter, LiveSetup, filter_state

    controller, window, log, store, db = rig
    controller.check_in(CheckIn("wren", "box 1", "ana", 301.0, "main"))       # a first, empty session
    qtbot.waitUntil(lambda: controller.rigs["box 1"].session_id is not None, timeout=10000)
    controller.check_out("box 1")
    qtbot.waitUntil(lambda: "wren" in controller.history_parts and not controller.jobs.titles(), timeout=20000)
    params = {"a_f": 0.95, "b_f": 0.05, "c": 1.2e-3, "slow_leak": 1e-5, "tau_b": 20.0, "q_f": 1e-3, "q_s": 1e-5}
    live = LiveFilter(LiveSetup(params, "error", True, np.array([-0.3, 0.0, 0.0, 0.0]), 0.01, below=0.1, above=0.1,
                                status="estimated"), np.array([-0.1, -0.2]), np.eye(2) * 1e-3, -0.25)
    controller.fits["wren"] = {"live": {**filter_state(live), "ended_at": None}, "session": 4}   # a cached fit
    controller.check_in(CheckIn("wren", "box 1", "ana", 301.0, "main"))
    qtbot.waitUntil(lambda: controller.rigs["box 1"].session_id is not None, timeout=10000)
    window.open_animal("wren")
    intervals = [650, 700, 640, 1000, 655, 610]
    with log.open("ab") as fh:
        fh.write(session_bytes(intervals))
    qtbot.waitUntil(lambda: "followed through 6 new trials" in controller.book.state("wren").consolidation.live_text,
                    timeout=10000)
    assert controller.rigs["box 1"].snapshot.fraction.trials_since_fit == len(intervals)
    assert "the fit of session 4" in controller.book.state("wren").consolidation.live_text


def test_a_file_rig_whose_log_was_imported_while_written_goes_on_after_the_imported_bytes(rig, qtbot):
    """The window follows a log whose beginning was imported (the rig still wrote it): from after the
    imported bytes, so that every event is stored once, and the tile's notices say so."""
    from drivers.wire import encode_event, encode_header
    from fixtures.devices import run_child

    controller, window, log, store, db = rig
    box3, protocol = log.with_name("box3.rsw"), log.with_name("p.toml")
    names = ("lever_down", "lever_up", "lick")
    box3.write_bytes(encode_header(fw="t") + b"".join(encode_event(i, names[i % 3]) for i in range(60)) + b"60 lev")
    imported = run_child("import", box3, "--animal", "heron", "--protocol", protocol, "--db", db, "--no-fit", "--quiet")
    assert imported.returncode == 0, imported.stderr
    controller.add_rig(RigSpec("box 3", "file", str(box3), protocol))
    with box3.open("ab") as fh:
        fh.write(b"er_up\n" + b"".join(encode_event(i, names[i % 3]) for i in range(61, 90)))

    def times():
        with sqlite3.connect(db) as conn:     # plain sqlite3, not the store's code
            return sorted(r[0] for r in conn.execute("SELECT raw_time FROM events"))

    qtbot.waitUntil(lambda: len(times()) >= 90, timeout=10000)
    qtbot.waitUntil(lambda: controller.writer.status().pending_rows == 0, timeout=10000)
    assert times() == list(range(90))
    with sqlite3.connect(db) as conn:
        notices = [r[0] for r in conn.execute("SELECT reason FROM raw_lines WHERE kind = 'notice'")]
    assert any("box3.rsw: its first" in n and "(60 events) were imported" in n for n in notices), notices
