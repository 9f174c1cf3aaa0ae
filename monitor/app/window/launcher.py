"""`rigside-window`: the window started from a desktop shortcut, with no console.

Rule: pip installs this as a GUI script, so on Windows it runs under pythonw
and no console window opens; there `sys.stdout` and `sys.stderr` are None, so
they are sent to `rigside-window.log` in the user log directory (elsewhere
they stay where they are). It runs `rigside window` with the given arguments;
when that fails (exit code not 0) the last line of the log is also shown in a
message box, since nobody reads a console that does not exist.
"""

from __future__ import annotations

import sys
from pathlib import Path
from typing import Sequence, TextIO


def log_path() -> Path:
    """Where the window's output goes when there is no console."""
    from platformdirs import user_log_dir

    return Path(user_log_dir("rigside", appauthor=False)) / "rigside-window.log"


def main(argv: Sequence[str] | None = None) -> int:
    from monitor.app.cli import main as cli_main

    words = list(sys.argv[1:] if argv is None else argv)
    log: TextIO | None = None
    if sys.stdout is None or sys.stderr is None:     # pythonw: no console
        path = log_path()
        path.parent.mkdir(parents=True, exist_ok=True)
        log = open(path, "a", encoding="utf-8", buffering=1)
        sys.stdout = sys.stdout or log
        sys.stderr = sys.stderr or log
    try:
        code = _exit_code(lambda: cli_main(["window", *words]))
    finally:
        if log is not None:
            log.flush()
    if code != 0 and log is not None:
        show_failure(log_path(), code)
    return code


def _exit_code(run) -> int:
    try:
        return int(run() or 0)
    except SystemExit as exc:          # argparse's exit on a bad argument
        return exc.code if isinstance(exc.code, int) else 2


def last_line(path: Path) -> str:
    """The last non-empty line of `path` (the one-line error of a failed start)."""
    lines = [line for line in path.read_text(encoding="utf-8", errors="replace").splitlines() if line.strip()]
    return lines[-1] if lines else ""


def show_failure(path: Path, code: int) -> None:
    """A message box with the failure's line and where the log is."""
    from PySide6.QtWidgets import QApplication, QMessageBox

    app = QApplication.instance() or QApplication(sys.argv[:1])
    QMessageBox.critical(None, "rigside", f"{last_line(path)}\n\nExit code {code}. The full log: {path}")
    del app
