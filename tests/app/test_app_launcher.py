"""`rigside-window` (the GUI script a desktop shortcut starts): with no console (pythonw sets
sys.stdout and sys.stderr to None, Python's docs on sys.__stderr__) a failure lands in the log
file and in the message box, with the command's exit code; `rigside --version` answers."""

from __future__ import annotations

import os
import subprocess
import sys
from importlib.metadata import version

CHILD = r"""
import sys
from pathlib import Path
from monitor.app.window import launcher
log, shown = Path(sys.argv[1]), Path(sys.argv[2])
launcher.log_path = lambda: log
launcher.show_failure = lambda path, code: shown.write_text(f"{code} {launcher.last_line(path)}")
sys.stdout = sys.stderr = None          # what pythonw gives a GUI script
code = launcher.main(sys.argv[3:])
sys.__stdout__.write(f"exit {code}\n")
"""


def run_without_console(tmp_path, *args):
    log, shown = tmp_path / "logs" / "rigside-window.log", tmp_path / "shown.txt"
    env = {**os.environ, "QT_QPA_PLATFORM": "offscreen"}
    result = subprocess.run([sys.executable, "-c", CHILD, str(log), str(shown), *args],
                            capture_output=True, text=True, timeout=120, env=env)
    return result, log, shown


def test_a_bad_option_goes_to_the_log_and_the_message_box(tmp_path):
    result, log, shown = run_without_console(tmp_path, "--seconds", "0")
    assert result.stdout.strip() == "exit 2", result.stderr
    line = "rigside window: error: --seconds: must be above 0, got 0"
    assert log.read_text().strip().endswith(line)
    assert shown.read_text() == f"2 {line}"


def test_an_unknown_argument_is_argparse_exit_2_not_a_traceback(tmp_path):
    result, log, shown = run_without_console(tmp_path, "--no-such-option")
    assert result.stdout.strip() == "exit 2" and "Traceback" not in log.read_text()
    assert shown.read_text() == "2 rigside: error: unrecognized arguments: --no-such-option"


def test_version_is_the_installed_distributions():
    result = subprocess.run([sys.executable, "-m", "monitor.app", "--version"], capture_output=True, text=True,
                            timeout=60)
    # importlib.metadata reads pip's record of the installed distribution
    assert result.returncode == 0 and result.stdout.strip() == f"rigside {version('rigside')}"
