"""No dead code: vulture finds nothing unused in the program (tests do not count as users).

The program is monitor, drivers, mock_rig, the benchmarks and the guide's
picture script; tests/dead_code_allowed.py names what vulture cannot see used
(framework callbacks, record fields written out whole) and what is still
waiting to be wired in or removed.
"""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
PROGRAM = ["monitor", "drivers", "mock_rig", "benchmarks", "docs/guide_screens.py"]
ALLOWED = "tests/dead_code_allowed.py"


def vulture(*paths: str) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "vulture", *paths], cwd=ROOT, capture_output=True, text=True,
                          timeout=120)


def test_nothing_unused_in_the_program():
    done = vulture(*PROGRAM, ALLOWED)
    assert done.stdout == "" and done.returncode == 0, done.stdout + done.stderr


def test_the_check_sees_an_unused_function(tmp_path):
    (tmp_path / "mod.py").write_text("def used():\n    return 1\n\n\ndef forgotten():\n    return 2\n\n\nused()\n")
    done = vulture(str(tmp_path / "mod.py"))
    assert "unused function 'forgotten'" in done.stdout and "'used'" not in done.stdout
