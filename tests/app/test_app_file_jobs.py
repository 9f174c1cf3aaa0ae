"""The window's File menu: import and export as jobs with progress and Cancel, through the commands' own work."""

from __future__ import annotations

import csv
import sqlite3

import pytest

from mock_rig.history import cohort, write_history
from monitor.app import cli
from monitor.app.window.controller import Controller
from monitor.store.writer import StoreWriter
from monitor.ui.file_dialogs import ExportChoice, ExportDialog, ImportChoice
from monitor.ui.main_window import MainWindow


@pytest.fixture
def app(qapp, tmp_path):
    history = tmp_path / "history"
    write_history(history, cohort(1, seed=4), days=5)   # alder: 5 weekday sessions
    writer = StoreWriter(tmp_path / "store.sqlite3")
    writer.start()
    controller = Controller(writer, alert_store=None, fit_consolidation=False)
    window = MainWindow(controller.board, controller.book, controller.alert_book)
    controller.attach(window)
    controller.start()
    yield controller, window, history, tmp_path / "store.sqlite3"
    controller.close()
    window.close()


def count(db, table: str) -> int:
    with sqlite3.connect(db) as conn:     # plain sqlite3, not the store's code
        return conn.execute(f"SELECT count(*) FROM {table}").fetchone()[0]


def event_lines(files) -> int:
    """Lines that carry an event, counted by hand: every non-empty line not starting with `#` (a header
    or comment), as the published wire format defines them (docs/wire-format.md, "Lines")."""
    return sum(1 for f in files for line in f.read_text().splitlines() if line.strip() and not line.startswith("#"))


def test_the_file_menu_imports_and_exports_through_the_commands_work(app, qtbot, tmp_path):
    controller, window, history, db = app
    menu = {a.text() for a in window.menuBar().actions()}
    assert "&File" in menu and {"import_files", "export"} <= set(window.actions)
    files = sorted(history.glob("alder_s*.rsw"))
    window.import_chosen.emit(ImportChoice(tuple(files), history / "alder.protocol.toml"))
    qtbot.waitUntil(lambda: controller.file_jobs.last is not None, timeout=60000)
    result = controller.file_jobs.last
    assert not result.stopped and result.imported == len(files) == 5
    assert count(db, "sessions") == 5 and count(db, "events") == result.events
    assert "Imported 5 files" in window.statusBar().currentMessage()

    folder = tmp_path / "out"
    folder.mkdir()
    controller.file_jobs.last = None
    window.export_chosen.emit(ExportChoice("events", folder))
    qtbot.waitUntil(lambda: controller.file_jobs.last is not None, timeout=60000)
    exported = controller.file_jobs.last
    with open(exported.path, newline="", encoding="utf-8") as fh:     # the csv module reads it back
        rows = list(csv.reader(fh))
    assert len(rows) - 1 == exported.rows == count(db, "events")
    # the same bytes as `rigside export events --csv`: one route for both
    by_command = tmp_path / "by-command.csv"
    assert cli.main(["export", "events", "--db", str(db), "--csv", str(by_command), "--quiet"]) == 0
    assert by_command.read_bytes() == exported.path.read_bytes()
    assert [p.parent for p in folder.iterdir()] == [folder] and exported.path.suffix == ".csv"


def test_cancel_stops_an_export_with_nothing_half_written_and_says_so(app, qtbot, tmp_path):
    controller, window, history, db = app
    files = sorted(history.glob("alder_s*.rsw"))
    assert cli.main(["import", *map(str, files), "--protocol", str(history / "alder.protocol.toml"),
                     "--db", str(db), "--no-fit", "--quiet"]) == 0
    assert count(db, "events") > 10000   # more than one progress step of 5000 rows
    folder = tmp_path / "out"
    folder.mkdir()
    controller.file_jobs.start_export("events", folder)
    controller.jobs.cancel_all()
    qtbot.waitUntil(lambda: controller.file_jobs.last is not None, timeout=60000)
    assert controller.file_jobs.last.stopped
    assert list(folder.iterdir()) == []          # neither the file nor its temporary twin
    assert "Export cancelled" in window.statusBar().currentMessage()
    assert "no file was written" in window.statusBar().currentMessage()


def test_cancel_stops_an_import_between_files_and_names_what_was_finished(app, qtbot):
    controller, window, history, db = app
    files = sorted(history.glob("alder_s*.rsw"))
    controller.file_jobs.start_import(files, history / "alder.protocol.toml")
    controller.jobs.cancel_all()
    qtbot.waitUntil(lambda: controller.file_jobs.last is not None, timeout=60000)
    result = controller.file_jobs.last
    assert result.stopped and result.imported < len(files)
    assert count(db, "sessions") == result.imported     # whole files only
    assert f"{result.imported} of {len(files)} files imported" in window.statusBar().currentMessage()
    # importing again finishes the rest and skips what was done
    controller.file_jobs.last = None
    controller.file_jobs.start_import(files, history / "alder.protocol.toml")
    qtbot.waitUntil(lambda: controller.file_jobs.last is not None, timeout=60000)
    assert count(db, "sessions") == len(files) and len(controller.file_jobs.last.skipped) == result.imported
    assert event_lines(files) == count(db, "events")


def test_the_export_dialog_refuses_a_missing_folder_and_emits_the_choice(qapp, tmp_path):
    dialog = ExportDialog()
    chosen = []
    dialog.chosen.connect(chosen.append)
    dialog.folder.setText(str(tmp_path / "nowhere"))
    assert not dialog.try_accept() and "No folder" in dialog.problem_line.text()
    dialog.folder.setText(str(tmp_path))
    dialog.kind.setCurrentIndex(2)
    assert dialog.try_accept() and chosen == [ExportChoice("nwb", tmp_path)]


def test_the_window_tracker_shows_counts_rate_and_time_left_and_reads_cancel():
    import threading

    from monitor.app.window.file_jobs import JobTracker

    class FakeJob:
        def __init__(self) -> None:
            self.shown: list[tuple[float, str]] = []
            self.cancel_event = threading.Event()

        def progress(self, fraction: float, message: str = "") -> None:
            self.shown.append((fraction, message))

        def cancelled(self) -> bool:
            return self.cancel_event.is_set()

    job = FakeJob()
    tracker = JobTracker(job)
    tracker.begin(200, "file", "importing")
    assert job.shown == [(0.0, "importing: 0 of 200 files")]
    tracker._started -= 10.0          # as if 10 s had passed: 50 files in 10 s = 5 files/s, 150 left = 30 s
    tracker._shown -= 1.0
    tracker.advance(50)
    fraction, message = job.shown[-1]
    assert fraction == 50 / 200 and message.startswith("importing: 50 of 200 files, 5.0 files/s, about 30 s left")
    assert not tracker.cancelled()
    job.cancel_event.set()
    assert tracker.cancelled()


def test_the_figures_line_shows_while_a_file_job_runs_and_goes_after_it(app, qtbot, tmp_path):
    controller, window, history, db = app
    files = sorted(history.glob("alder_s*.rsw"))
    assert cli.main(["import", *map(str, files), "--protocol", str(history / "alder.protocol.toml"),
                     "--db", str(db), "--no-fit", "--quiet"]) == 0
    lines: list[str] = []
    controller.file_jobs.figures_changed.connect(lines.append)
    folder = tmp_path / "out"
    folder.mkdir()
    controller.file_jobs.start_export("trials", folder)
    qtbot.waitUntil(lambda: controller.file_jobs.last is not None, timeout=60000)
    trials = count(db, "trials")
    assert lines and lines[0] == f"exporting trials: 0 of {trials:,} rows"
    assert not controller.file_jobs.figures.isVisibleTo(window)


def test_the_import_dialog_finds_the_animals_protocol_beside_its_files(qapp, tmp_path):
    from monitor.ui.file_dialogs import ImportDialog, protocol_beside

    write_history(tmp_path, cohort(2, seed=4), days=1)      # alder and birch, a protocol file each
    assert protocol_beside(tmp_path / "birch_s01.rsw") == tmp_path / "birch.protocol.toml"
    dialog = ImportDialog()
    chosen = []
    dialog.chosen.connect(chosen.append)
    assert not dialog.try_accept() and "Choose the session files" in dialog.problem_line.text()
    dialog.set_files([tmp_path / "alder_s01.rsw"])
    dialog.protocol.setText(str(protocol_beside(tmp_path / "alder_s01.rsw")))
    assert dialog.try_accept() and chosen == [ImportChoice((tmp_path / "alder_s01.rsw",),
                                                           tmp_path / "alder.protocol.toml")]


def test_the_file_menu_exports_one_nwb_file_per_session(app, qtbot, tmp_path):
    pynwb = pytest.importorskip("pynwb")
    controller, window, history, db = app
    files = sorted(history.glob("alder_s*.rsw"))
    assert cli.main(["import", *map(str, files), "--protocol", str(history / "alder.protocol.toml"),
                     "--db", str(db), "--no-fit", "--quiet"]) == 0
    folder = tmp_path / "nwb"
    folder.mkdir()
    window.export_chosen.emit(ExportChoice("nwb", folder))
    qtbot.waitUntil(lambda: controller.file_jobs.last is not None, timeout=120000)
    result = controller.file_jobs.last
    written = sorted(folder.glob("*.nwb"))
    assert not result.stopped and len(written) == len(result.written) == count(db, "sessions") == 5
    with pynwb.NWBHDF5IO(str(written[0]), "r") as io:     # pynwb reads the file back
        assert io.read().subject.subject_id == "alder"
    assert "Exported 5 NWB files" in window.statusBar().currentMessage()
