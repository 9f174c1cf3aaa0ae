"""`rigside window` (also plain `rigside`): the window for this PC's real rigs, all day.

Rule: the rigs come from the rig list (`--rigs`, default the user config
directory's rigs.toml; monitor.app.rigs), the data go to the store
(`--db`); a rig added from the window's "Add rig" dialog is appended to the
list, so the window opens with it tomorrow. A bad rig list or protocol file
is refused before any window opens: one line naming the file, line and key,
exit 2; so is a PC with no display or without the system libraries Qt
needs (monitor.app.first_run). Each rig's source starts at once (its events are kept, in a session
with no animal, until someone checks an animal in). The window's geometry and
layout are saved between runs. Every platform's stop requests and closing the window stop
the sources, end open sessions and flush the store; exit 0 when everything
received was stored, 1 otherwise. `--seconds N` closes after N seconds
(scripts and tests; with `--screenshot FILE` the window is saved first).
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from monitor.app.errors import UsageError, plain_error
from monitor.app.paths import add_db_argument, resolve_db
from monitor.app.settings import add_settings_argument, care_config, default_settings_path, lab_url, settings_path


def add_arguments(parser: argparse.ArgumentParser) -> None:
    add_db_argument(parser)
    parser.add_argument("--rigs", type=Path, help="the rig list (default: rigs.toml in the user config directory)")
    parser.add_argument("--seconds", type=float, help="close after this many seconds (default: when closed)")
    parser.add_argument("--screenshot", type=Path, help="with --seconds: save the window as a PNG before closing")
    add_settings_argument(parser)


def run(args: argparse.Namespace) -> int:
    from drivers.config import ConfigError
    from monitor.app.rigs import load_protocol
    from monitor.app.rigs import default_rigs_path, read_rigs

    if args.seconds is not None and not args.seconds > 0:
        raise UsageError(f"--seconds: must be above 0, got {args.seconds:g}")
    if args.screenshot is not None and args.seconds is None:
        raise UsageError("--screenshot needs --seconds (the picture is taken at the end)")
    rigs_path = args.rigs or default_rigs_path()
    try:
        specs = read_rigs(rigs_path)
    except ConfigError as exc:
        raise UsageError(f"--rigs: {exc}") from None
    except (OSError, ValueError) as exc:
        raise UsageError(f"--rigs: {rigs_path}: {plain_error(exc)}") from None
    for spec in specs:
        try:
            load_protocol(spec.protocol_path)
        except ConfigError as exc:
            raise UsageError(f"--rigs: {rigs_path}: [[rig]] {spec.name}, protocol: {exc}") from None
        except (OSError, UnicodeDecodeError) as exc:
            why = exc.strerror if isinstance(exc, OSError) and exc.strerror else "not a text file"
            raise UsageError(f"--rigs: {rigs_path}: [[rig]] {spec.name}, protocol: cannot read "
                             f"{spec.protocol_path} ({why})") from None
    try:
        care = care_config(settings_path(args.settings))      # the lab's [care] thresholds
        lab = (args.settings or default_settings_path(), lab_url(None, args.settings))  # the lab database, if set
    except ValueError as exc:
        raise UsageError(f"--settings: {exc}") from None
    from monitor.app.first_run import display_problem

    problem = display_problem(headless=False)
    if problem:
        raise UsageError(problem)
    return open_window(resolve_db(args.db), rigs_path, specs, args.seconds, args.screenshot, care, lab=lab)


def open_window(db_path: Path, rigs_path: Path, specs: list, seconds: float | None, screenshot: Path | None,
                care=None, lab: tuple[Path, str | None] | None = None) -> int:
    """Build the window on the store and the rigs, run it until closed; the exit code.

    `lab`: (settings file, lab URL or None) for the background sync and the lab view."""
    from PySide6.QtCore import QCoreApplication, QEvent, QSettings, QTimer
    from PySide6.QtWidgets import QApplication

    from monitor.app.window.controller import Controller
    from monitor.app.window.discovery import discover_devices
    from monitor.app.rigs import append_rig
    from monitor.store.writer import StoreWriter
    from monitor.ui.main_window import MainWindow

    db_path.parent.mkdir(parents=True, exist_ok=True)
    app = QApplication.instance() or QApplication(sys.argv[:1])
    writer = StoreWriter(db_path)
    writer.start()
    controller = Controller(writer)
    protocols = sorted({str(spec.protocol_path) for spec in specs})
    window = MainWindow(controller.board, controller.book, controller.alert_book,
                        settings=QSettings("rigside", "rigside"), discover_devices=discover_devices,
                        protocols=lambda: protocols)
    controller.attach(window, care=care)
    link = None
    if lab is not None:
        from monitor.app.window.lab_background import LabLink
        link = LabLink(window, db_path, *lab)
    window.rig_added.connect(lambda setup: append_rig(rigs_path, setup))
    from monitor.store.source_locks import SourceBusy

    for spec in specs:
        try:
            controller.add_rig(spec)
        except SourceBusy as exc:
            controller.close()
            raise UsageError(f"rig {spec.name}: {exc}") from None
    print(f"rigside: {len(specs)} rigs from {rigs_path}, database {db_path}", file=sys.stderr)
    window.show()
    controller.start()
    controller.install_signal_handlers(app)

    def finish() -> None:
        if screenshot is not None:
            window.grab().save(str(screenshot))
        window.close()
        app.quit()

    if seconds is not None:
        QTimer.singleShot(int(seconds * 1000), finish)
    try:
        app.exec()
    finally:
        if link is not None:
            link.stop()
        stored = controller.close()
        window.deleteLater()
        QCoreApplication.sendPostedEvents(None, QEvent.Type.DeferredDelete)
    return 0 if stored else 1
