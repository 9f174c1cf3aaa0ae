"""An animal's pages from the lab database, against a real PostgreSQL: the same page as the rig PC builds from
its own store, read-only, opened from the lab view with the read off the GUI thread.

References: the PC's own SQLite store (sqlite3's counts of its sessions, trials and hits) and the page the rig
PC's code builds from that store."""

from __future__ import annotations

import sqlite3
from datetime import datetime, timezone
from pathlib import Path

import numpy as np
import pytest

from mock_rig.history import cohort, write_history
from monitor.app.cli import main
from monitor.app.window.lab_pages import READ_ONLY_NOTE, ReadJob, page_from_store, read_page
from monitor.core.care.ledger import CareConfig
from monitor.core.eligibility.decision_log import Decision
from monitor.store import lab_sync
from monitor.store.care_log import add_supplement, add_weighing
from monitor.store.db import open_store
from monitor.store.decisions import append_decision
from monitor.store.lab_schema import LabError

SHOTS = Path("/tmp/rigside-shots")
NOW = datetime(2026, 2, 10, 18, 0, tzinfo=timezone.utc)


@pytest.fixture(scope="module")
def store(tmp_path_factory) -> Path:
    """One PC: alder (fitted, two decisions, a weighing and a supplement) and birch, 4 days each."""
    out = tmp_path_factory.mktemp("lab-pages")
    write_history(out / "h", cohort(2, seed=3), days=4)
    db = out / "pc.sqlite3"
    for animal in ("alder", "birch"):
        files = sorted((out / "h").glob(f"{animal}_s*.rsw"))
        fit = () if animal == "alder" else ("--no-fit",)
        assert main([*map(str, ["import", *files, "--protocol", out / "h" / f"{animal}.protocol.toml", "--db", db,
                                *fit])]) == 0
    conn = open_store(db)
    conn.execute("BEGIN IMMEDIATE")
    for reason in ("not yet: plateau just reached", "still waiting"):
        append_decision(conn, Decision(decision="deferred", animal="alder", operator="kim", reason=reason,
                                       time="2026-02-10T10:00:00+01:00"))
    add_weighing(conn, "alder", at="2026-02-10T09:00:00+01:00", grams=298.0, by="kim")
    add_supplement(conn, "alder", at="2026-02-10T17:00:00+01:00", ml=2.5, by="kim")
    conn.execute("COMMIT")
    conn.close()
    return db


def synced(db: Path, url: str) -> None:
    assert main(["lab", "init", "--lab", url]) == 0
    conn = open_store(db)
    try:
        lab_sync.sync(conn, url, pc_name="room-a")
    finally:
        conn.close()


def test_the_lab_page_is_the_rig_pcs_page(store, lab_url):
    synced(store, lab_url)
    page = read_page(lab_url, "alder", CareConfig(), NOW)
    local = page_from_store(store, "alder", CareConfig(), NOW, ReadJob(lambda: False))  # the rig PC's path, own store
    state = page.state
    assert state.animal == "alder" and state.rig == "lab copy, trained on room-a" and state.protocol == local.protocol
    # reference: sqlite3's own counts in the PC's store (completed trials: hits and misses)
    with sqlite3.connect(store) as conn:
        counts = conn.execute("SELECT s.id, count(t.idx), coalesce(sum(t.rewarded), 0) FROM sessions AS s "
                              "LEFT JOIN trials AS t ON t.session_id = s.id AND t.outcome IN ('hit', 'miss') "
                              "WHERE s.animal = 'alder' GROUP BY s.id ORDER BY s.started_at, s.id").fetchall()
    assert [(row.trials, row.hits) for row in state.sessions] == [(n, hits) for _, n, hits in counts]
    assert state.sessions == local.sessions
    for name in ("session", "measure", "low", "high"):
        np.testing.assert_array_equal(getattr(state.curve, name), getattr(local.curve, name))
    assert (state.curve.plateau_word, state.curve.plateau_reason) == (local.curve.plateau_word,
                                                                      local.curve.plateau_reason)
    assert state.consolidation.model_comparison == local.consolidation.model_comparison
    np.testing.assert_array_equal(state.consolidation.fraction, local.consolidation.fraction)
    assert len(state.consolidation.fraction) > 0  # the PC's cached fit came along
    assert state.consolidation.measures_session == len(counts)  # the eligibility's figures: of the latest session
    # the care day: 2.5 ml of supplement and the weighing, as on the PC
    assert state.care_text == local.care_text and "2.50 supplement" in state.care_text and "298.0 g" in state.care_text
    assert state.eligibility_text == local.eligibility_text
    # the latest session's histograms, against sqlite3's own count of its completed trials and numpy's histogram
    # of the session before's intervals on the same bins
    with sqlite3.connect(store) as conn:
        latest, before = [r[0] for r in conn.execute("SELECT id FROM sessions WHERE animal = 'alder' "
                                                      "ORDER BY started_at DESC, id DESC LIMIT 2")]
        stage = conn.execute("SELECT stage FROM trials WHERE session_id = ? ORDER BY idx DESC LIMIT 1",
                             (latest,)).fetchone()[0]
        earlier = [r[0] for r in conn.execute(
            "SELECT interval_ms FROM trials WHERE session_id = ? AND stage = ? AND outcome IN ('hit', 'miss') "
            "AND interval_ms IS NOT NULL", (before, stage))]
    today = state.today
    assert today is not None and today.trials == counts[-1][1] and today.hits == counts[-1][2]
    assert int(np.sum(today.linear.today)) <= today.trials
    assert earlier  # days 3 and 4 of the simulated history are both of the final stage
    np.testing.assert_array_equal(today.linear.previous, np.histogram(earlier, bins=today.linear.edges_ms)[0])
    assert [row[7] for row in page.history.rows] == ["not yet: plateau just reached", "still waiting"]
    assert page.history.chain_ok and "room-a: Decision log intact: 2 entries" in page.history.chain_text


@pytest.mark.slow
def test_the_lab_page_equals_the_page_the_rig_pcs_window_shows(qtbot, store, lab_url, tmp_path):
    """The rig PC's own window over a copy of its store, the animal's page opened there, against the lab's."""
    from fixtures.windows import window_over
    from monitor.app.rigs import LoadedProtocol
    from monitor.store.derive import protocol_of
    from monitor.store.manipulations import latest_protocol_text

    synced(store, lab_url)
    db = tmp_path / "rig-pc.sqlite3"
    with sqlite3.connect(store) as source, sqlite3.connect(db) as target:
        source.backup(target)
    conn = open_store(db, readonly=True)
    text = latest_protocol_text(conn, "alder")
    conn.close()
    with window_over(db) as (controller, window):
        controller.protocols["alder"] = LoadedProtocol(protocol_of(text), text, tmp_path / "alder.protocol.toml")
        window.open_animal("alder")
        qtbot.waitUntil(lambda: judged_page(controller, "alder"), timeout=60_000)
        rig_pc = controller.book.state("alder")
    lab = read_page(lab_url, "alder", CareConfig()).state
    assert lab.sessions == rig_pc.sessions and lab.protocol == rig_pc.protocol
    for name in ("session", "measure", "low", "high"):
        np.testing.assert_array_equal(getattr(lab.curve, name), getattr(rig_pc.curve, name))
    assert lab.curve.plateau_reason == rig_pc.curve.plateau_reason
    for name in ("trials_since_plateau", "sessions_since_plateau", "interval_error", "cv", "measures_session",
                 "model_comparison", "estimate_text"):
        assert getattr(lab.consolidation, name) == getattr(rig_pc.consolidation, name), name
    np.testing.assert_array_equal(lab.consolidation.fraction_low, rig_pc.consolidation.fraction_low)
    assert (lab.care_text, lab.eligibility_text) == (rig_pc.care_text, rig_pc.eligibility_text)


def judged_page(controller, animal: str) -> bool:
    """The window's page of `animal` has its history, its care day and its judged figures, and no job runs."""
    state = controller.book.state(animal)
    return state is not None and state.consolidation is not None and animal in controller.decisions_and_care.summaries \
        and state.consolidation.measures_session is not None and not controller.jobs.titles()


@pytest.mark.slow
def test_one_animal_trained_on_two_pcs_is_one_page(store, lab_url, tmp_path):
    first, second = tmp_path / "room-a.sqlite3", tmp_path / "room-b.sqlite3"  # the same rows on two PCs
    for db in (first, second):
        with sqlite3.connect(store) as source, sqlite3.connect(db) as target:
            source.backup(target)
        with sqlite3.connect(db) as conn:
            conn.execute("UPDATE animals SET lab_id = 'RT-' || name")  # one animal per name across the two PCs
    with sqlite3.connect(second) as conn:
        conn.execute("DELETE FROM lab_sync")  # a PC identity of its own
    synced(first, lab_url)
    conn = open_store(second)
    try:
        lab_sync.sync(conn, lab_url, pc_name="room-b")
    finally:
        conn.close()
    page = read_page(lab_url, "alder", CareConfig(), NOW)
    with sqlite3.connect(store) as conn:  # reference: sqlite3's counts in each PC's store
        sessions = conn.execute("SELECT count(*) FROM sessions WHERE animal = 'alder'").fetchone()[0]
        decisions = conn.execute("SELECT count(*) FROM decisions WHERE animal = 'alder'").fetchone()[0]
    assert len(page.state.sessions) == 2 * sessions and page.state.rig == "lab copy, trained on room-a, room-b"
    assert len(page.history.rows) == 2 * decisions
    assert "room-a: Decision log intact" in page.history.chain_text and "room-b: Decision log intact" in \
        page.history.chain_text


def test_an_animal_the_lab_does_not_hold_is_a_clear_error(store, lab_url):
    synced(store, lab_url)
    with pytest.raises(LabError, match="no animal 'rowan' in the lab"):
        read_page(lab_url, "rowan", CareConfig(), NOW)


def test_the_lab_view_opens_a_read_only_page(qtbot, store, lab_url, tmp_path):
    from PySide6.QtWidgets import QMainWindow

    from monitor.app.window.lab_background import LabLink

    synced(store, lab_url)
    window = QMainWindow()
    qtbot.addWidget(window)
    link = LabLink(window, tmp_path / "other-pc.sqlite3", tmp_path / "settings.toml", None)
    link.url = lab_url  # reads the lab without syncing this (empty) PC
    view = link.open_view()
    qtbot.waitUntil(lambda: view.animals.rowCount() == 2, timeout=120_000)
    row = next(r for r in range(2) if view.animals.item(r, 0).text() == "alder")
    view.animals.cellDoubleClicked.emit(row, 0)
    qtbot.waitUntil(lambda: "alder" in link.pages.windows, timeout=120_000)
    shown = link.pages.windows["alder"]
    page = shown.page
    assert "read-only" in shown.windowTitle() and page.read_only_note.text() == READ_ONLY_NOTE
    assert not page.read_only_note.isHidden()
    for button in (page.record_buttons["decide"], page.record_buttons["care"], page.record_buttons["manipulation"],
                   page.sessions.exclude_button, page.sessions.condition_button):
        assert button.isHidden()
    assert not page.record_buttons["decisions"].isHidden()
    with sqlite3.connect(store) as conn:  # reference: sqlite3's count of the PC's sessions
        sessions = conn.execute("SELECT count(*) FROM sessions WHERE animal = 'alder'").fetchone()[0]
    assert page.sessions.table.rowCount() == sessions
    page.record_buttons["decisions"].click()
    assert shown.dialog is not None and shown.dialog.isVisible()
    SHOTS.mkdir(exist_ok=True)
    shown.resize(1100, 760)
    assert page.sections.tabText(0) == "Latest session" and page.histogram.today.getData()[1] is not None
    shown.grab().save(str(SHOTS / "lab-animal-page.png"))
    page.sections.setCurrentIndex(2)
    shown.grab().save(str(SHOTS / "lab-animal-consolidation.png"))
    view.grab().save(str(SHOTS / "lab-view.png"))
    link.stop()
