"""`rigside demo`: four simulated boxes through the real serial path, the store and the full window.

Rule: the demo cohort of mock_rig (naive, learning, plateaued but not
consolidated, consolidated, with weeks of generated history) is written into
the demo folder (a fresh temporary one unless `--folder`, removed at the
end), each animal goes live on its own pseudo-terminal behind a symlink and
is read by the real `SerialSource`, through the Fanout into a fresh demo
database (unless `--db`) and the engine, and each animal is checked in to its
box. Without ptys (Windows), or with `--sockets`, each box listens on a local
TCP port and the same `SerialSource` opens `socket://127.0.0.1:PORT` through
pyserial, as it opens a COM port; with `--files` each box appends to a log
file read by the real `FileTail`. History: the generated session files are imported into the demo
database with the store's importer in a worker job (progress in the status
bar), and animal pages read their history from the store once it is done.
`wait_for` processes Qt events while it waits (the demo's own steps, and the
guide's pictures). Headless (`--headless`) uses the
offscreen platform, sizes the window 1366×768 and saves `window.grab()` to
`--screenshot` when `--seconds` have passed; exit 0 when every row was stored.
"""

from __future__ import annotations

import os
import shutil
import sys
import tempfile
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

from mock_rig import scenario
from monitor.core.care.ledger import CareConfig
from monitor.core.protocol import TrainingProtocol
from monitor.store.history import HistorySession

SECTIONS = {"today": 0, "curve": 1, "consolidation": 2, "sessions": 3}
CHECK_IN_WEIGHT_G = 310.0   # the demo's rats weigh in at this (our own figure)
BASELINE_WEIGHT_G = 335.0   # and weighed this before water restriction began (our own figure: 92.5 %)


@dataclass
class DemoOptions:
    speed: float = 10.0
    seconds: float | None = None
    headless: bool = False
    screenshot: Path | None = None
    db: Path | None = None
    folder: Path | None = None
    seed: int = 7
    animal: str | None = None
    section: str = "today"
    files: bool = False
    sockets: bool = False
    fit: bool = True
    wait_history: float = 0.0
    history: tuple[int, ...] | None = None   # sessions of history per animal (default: mock_rig's 1, 8, 20, 75)
    care: CareConfig | None = None           # the lab's [care] thresholds (None: the defaults)


class ImportedHistory:
    """The store's history, once the demo's files are imported (waits, cancellably, until then)."""

    def __init__(self, inner, done: threading.Event) -> None:
        self.inner, self.done = inner, done

    def sessions(self, animal: str, protocol: TrainingProtocol, job) -> list[HistorySession]:
        while not self.done.wait(0.2):
            job.progress(0.0, "waiting for the demo history to be imported")
        return self.inner.sessions(animal, protocol, job)


def import_history(controller, prepared, done: threading.Event) -> None:
    """Import every demo session file into the store, in a worker job; set `done` at the end."""
    from monitor.store.importer import ImportRefused, import_file
    from mock_rig.history import subject_record
    from monitor.store.registry import ensure_animal

    files = [(d, path) for d in prepared for path in d.session_files]

    def work(job) -> int:
        count = 0
        try:
            for k, d in enumerate(prepared):  # the cohort's subject records; the baseline for the care day's percentage
                subject = subject_record(k, d.animal.name)
                controller.writer.call(lambda c, name=d.animal.name, r=subject: ensure_animal(
                    c, name, cohort=scenario.COHORT, species=r["species"], strain=r["strain"], sex=r["sex"],
                    date_of_birth=r["date-of-birth"], genotype=r["genotype"], baseline_weight_g=BASELINE_WEIGHT_G))
            for k, (d, path) in enumerate(files):
                job.progress(k / len(files), f"{path.name}")
                text = d.protocol_path.read_text(encoding="utf-8")
                protocol = controller.protocols[d.animal.name].protocol
                data = path.read_bytes()
                try:
                    controller.writer.call(lambda c: import_file(
                        c, path, data, protocol_text=text, protocol_name=protocol.name,
                        protocol_version=protocol.version, animal=d.animal.name))
                    count += 1
                except ImportRefused:       # --db given and imported before: keep what is there
                    pass
        finally:
            done.set()
        return count

    def finished(count: int) -> None:
        for animal in list(controller.history_parts):
            controller.load_history(animal, refresh=True)

    controller.run_job("importing the demo history", work, finished)


def wait_for(condition: Callable[[], bool], timeout: float, app) -> bool:
    """Process Qt events until `condition()` holds or `timeout` seconds pass."""
    deadline = time.monotonic() + timeout
    while not condition():
        if time.monotonic() > deadline:
            return False
        app.processEvents()
        time.sleep(0.01)
    return True


def run(options: DemoOptions, inspect=None) -> int:
    """Run the demo until the window closes, a signal, or `options.seconds`; the exit code.

    `inspect(controller, window)` is called at the end, before anything stops (tests use it).
    """
    if options.headless:
        os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")
    temporary = options.folder is None
    folder = options.folder or Path(tempfile.mkdtemp(prefix="rigside-demo-"))
    try:
        return _run(options, folder, inspect)
    finally:
        if temporary:
            shutil.rmtree(folder, ignore_errors=True)
            if folder.exists():
                print(f"rigside demo: could not remove {folder}; delete it by hand", file=sys.stderr)


def _run(options: DemoOptions, folder: Path, inspect) -> int:
    """The demo in `folder` (see `run`)."""
    from PySide6.QtCore import QCoreApplication, QEvent, QSettings, QTimer
    from PySide6.QtWidgets import QApplication

    from mock_rig.demo import STAGES, prepare_demo, start_demo
    from mock_rig.live import LiveRig, stop_rigs
    from mock_rig.outputs import FileOutput, pty_available
    from monitor.app.rigs import RigSpec, load_protocol
    from monitor.app.window.controller import Controller
    from monitor.app.window.pages import StoreHistory
    from monitor.app.window.discovery import discover_devices
    from monitor.core.alerts import AlertRules
    from monitor.store.writer import StoreWriter
    from monitor.ui.main_window import MainWindow
    from monitor.ui.models import CheckIn

    folder.mkdir(parents=True, exist_ok=True)
    db_path = options.db or folder / "demo.sqlite3"
    print(f"rigside demo: files in {folder}, database {db_path}", file=sys.stderr)
    stages = STAGES if options.history is None else tuple(
        (label, name, count) for (label, name, _), count in zip(STAGES, options.history))
    prepared = prepare_demo(folder / "history", seed=options.seed, stages=stages)
    app = QApplication.instance() or QApplication(sys.argv[:1])
    writer = StoreWriter(db_path)
    writer.start()
    protocols = {d.animal.name: load_protocol(d.protocol_path) for d in prepared}
    imported = threading.Event()
    history = ImportedHistory(StoreHistory(db_path), imported)
    controller = Controller(writer, history=history, rules=AlertRules(clock_rate=options.speed),
                            protocols=protocols, fit_consolidation=options.fit)
    settings = None if options.headless else QSettings("rigside", "rigside-demo")
    window = MainWindow(controller.board, controller.book, controller.alert_book, settings=settings,
                        discover_devices=discover_devices,
                        protocols=lambda: [str(d.protocol_path) for d in prepared])
    controller.attach(window, care=options.care)
    if options.files:
        rigs = []
        for d in prepared:
            path = folder / f"{d.animal.board.rig_name}.rsw"
            rigs.append(LiveRig(d.animal, FileOutput(path), speed=options.speed, sessions=None).start())
            controller.add_rig(RigSpec(d.animal.board.rig_name, "file", str(path), d.protocol_path), start=False)
    else:
        via = "socket" if options.sockets or not pty_available() else "pty"
        rigs = start_demo(prepared, link_dir=folder / "dev", speed=options.speed, via=via)
        for d, rig in zip(prepared, rigs):   # a pty behind its symlink, or socket://127.0.0.1:PORT
            port = str(folder / "dev" / d.animal.name) if via == "pty" else str(rig.output.device)
            controller.add_rig(RigSpec(d.animal.board.rig_name, "serial", port, d.protocol_path), start=False)
    window.resize(1366, 768)
    window.show()
    controller.start()
    controller.install_signal_handlers(app)
    import_history(controller, prepared, imported)
    for d in prepared:       # check in first, then open the ports: every event lands in its animal's session
        stage = d.animal.protocol.stages[d.animal.stage_index].name
        controller.check_in(CheckIn(d.animal.name, d.animal.board.rig_name, "demo", CHECK_IN_WEIGHT_G, stage))
    wait_for(lambda: all(r.session_id is not None for r in controller.rigs.values()), 10.0, app)
    for name in controller.rigs:
        controller.start_source(name)
    if options.animal:
        wait_for(lambda: options.animal in controller.roster().occupied.values(), 10.0, app)
        page = window.open_animal(options.animal)
        page.sections.setCurrentIndex(SECTIONS[options.section])

    def finish() -> None:
        if options.wait_history and options.animal:
            wait_for(lambda: options.animal in controller.history_parts
                     and (not options.fit or options.animal in controller.fits), options.wait_history, app)
            wait_for(lambda: False, 0.3, app)
        if options.screenshot is not None:
            window.resize(1366, 768)
            app.processEvents()
            window.grab().save(str(options.screenshot))
        if inspect is not None:
            inspect(controller, window)
        window.close()
        app.quit()

    if options.seconds is not None:
        QTimer.singleShot(int(options.seconds * 1000), finish)
    try:
        app.exec()
    finally:
        stored = controller.close()
        stop_rigs(rigs)
        window.deleteLater()  # leave no top-level window behind in a host application (tests)
        QCoreApplication.sendPostedEvents(None, QEvent.Type.DeferredDelete)
    tiles = {name: controller.board.state(name) for name in controller.board.rigs()}   # what the tiles showed
    print("rigside demo: trials per box: " + ", ".join(f"{name} {state.trials_today if state else 0}"
                                                       for name, state in tiles.items()), file=sys.stderr)
    return 0 if stored else 1
