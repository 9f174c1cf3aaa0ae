"""POSIX-only modules stay behind their seams, and the main paths run where they do not exist.

Windows has no fcntl, pty, termios, tty or resource. The static check reads every
module-level import of the project's code and tests (a module that imports one
of them at the top breaks import, or test collection, on Windows); the child
process checks run `rigside demo` and `python -m mock_rig` with those modules
made unimportable by a meta-path blocker, so the live boxes must go through
pyserial's socket:// URL handler (pyserial 3.5's URL handlers) into the real
SerialSource, as a COM port would.
"""

from __future__ import annotations

import ast
import os
import re
import sqlite3
import struct
import subprocess
import sys
import time
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
POSIX_ONLY = ("fcntl", "pty", "termios", "tty", "resource", "pwd", "grp", "posix")
SEAMS = {"mock_rig/ptys.py"}   # the one module allowed to import them at the top

# Blocks the POSIX-only modules for every importer except pyserial itself: pyserial picks its
# backend by platform (serialposix here, serialwin32 on Windows), so its own import is allowed and
# the modules it loaded are dropped from sys.modules afterwards, so that nothing else gets them free.
BLOCKER = r"""
import runpy, sys
BLOCKED = {"fcntl", "pty", "termios", "tty", "resource"}
class Blocker:
    def find_spec(self, name, path=None, target=None):
        if name.split(".")[0] not in BLOCKED:
            return None
        frame = sys._getframe(1)
        while frame is not None and frame.f_code.co_filename.startswith("<frozen"):
            frame = frame.f_back
        importer = frame.f_globals.get("__name__", "") if frame is not None else ""
        if importer == "serial" or importer.startswith("serial."):
            return None
        raise ModuleNotFoundError(f"No module named {name!r} (blocked for this test)", name=name)
sys.meta_path.insert(0, Blocker())
import serial, serial.tools.list_ports
for name in BLOCKED:
    sys.modules.pop(name, None)
try:
    import tty
except ModuleNotFoundError:
    pass
else:
    sys.exit("the blocker does not block")
module, *argv = sys.argv[1:]
sys.argv = [module, *argv]
runpy.run_module(module, run_name="__main__", alter_sys=True)
"""


def top_level_imports(source: str) -> list[tuple[int, str]]:
    """(line, module) of imports executed when the module is imported (not inside functions)."""
    found: list[tuple[int, str]] = []

    def visit(nodes) -> None:
        for node in nodes:
            if isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef, ast.Lambda)):
                continue
            if isinstance(node, ast.Import):
                found.extend((node.lineno, a.name) for a in node.names)
            elif isinstance(node, ast.ImportFrom) and node.level == 0 and node.module:
                found.append((node.lineno, node.module))
            elif isinstance(node, ast.ClassDef):
                visit(node.body)
            elif isinstance(node, (ast.If, ast.Try, ast.With)):
                visit(ast.iter_child_nodes(node))

    visit(ast.parse(source).body)
    return found


def posix_only_at_top(folders: list[Path], root: Path = ROOT) -> list[str]:
    problems = []
    for folder in folders:
        for path in sorted(folder.rglob("*.py")):
            rel = path.relative_to(root).as_posix()
            if rel in SEAMS or ".venv" in path.parts:
                continue
            for line, module in top_level_imports(path.read_text(encoding="utf-8")):
                if module.split(".")[0] in POSIX_ONLY:
                    problems.append(f"{rel}:{line} imports {module} at module level")
    return problems


def test_no_posix_only_module_is_imported_at_module_level():
    folders = [ROOT / name for name in ("monitor", "drivers", "mock_rig", "benchmarks", "tests", "docs")]
    assert posix_only_at_top(folders) == []


def test_the_static_check_sees_a_top_level_import_and_ignores_a_lazy_one(tmp_path):
    (tmp_path / "a.py").write_text("import os\nimport termios\n\ndef f():\n    import pty\n")
    (tmp_path / "b.py").write_text("try:\n    import fcntl\nexcept ImportError:\n    fcntl = None\n")
    assert posix_only_at_top([tmp_path], root=tmp_path) == [
        "a.py:2 imports termios at module level", "b.py:2 imports fcntl at module level"]


def run_blocked(module: str, *args: str, timeout: float = 240) -> subprocess.CompletedProcess:
    env = {k: v for k, v in os.environ.items() if k != "QT_QPA_PLATFORM"}
    return subprocess.run([sys.executable, "-c", BLOCKER, module, *args], capture_output=True, text=True,
                          timeout=timeout, env=env, cwd=ROOT)


def png_size(path: Path) -> tuple[int, int]:
    """Width and height from a PNG's IHDR chunk (PNG specification, ISO/IEC 15948: bytes 16-24)."""
    data = path.read_bytes()[:24]
    assert data[:8] == b"\x89PNG\r\n\x1a\n"
    return struct.unpack(">II", data[16:24])


@pytest.mark.slow  # a 20 s demo in a child process
def test_demo_runs_live_through_socket_urls_without_posix_modules(tmp_path):
    shot, folder = tmp_path / "x.png", tmp_path / "demo"
    result = run_blocked("monitor.app", "demo", "--headless", "--seconds", "20", "--screenshot", str(shot),
                         "--folder", str(folder), "--history", "1,2,3,4", "--no-fit")
    assert result.returncode == 0, result.stderr[-3000:]
    assert png_size(shot) == (1366, 768)
    # the tiles' figure: trials today per box, as the window's tiles showed it at the end
    line = next(s for s in result.stderr.splitlines() if "trials per box" in s)
    tiles = dict((box, int(n)) for box, n in re.findall(r"(box\d) (\d+)", line))
    assert sorted(tiles) == ["box1", "box2", "box3", "box4"] and min(tiles.values()) > 0, line
    with sqlite3.connect(folder / "demo.sqlite3") as conn:   # read with plain sqlite3, not the store's code
        sources = conn.execute("SELECT kind, path FROM sources ORDER BY rig").fetchall()
        live = dict(conn.execute("SELECT s.rig, count(*) FROM events e JOIN sessions s ON s.id = e.session_id "
                                 "WHERE s.animal != '' AND s.source_id IS NOT NULL GROUP BY s.rig").fetchall())
    assert len(sources) == 4
    assert all(kind == "serial" and re.fullmatch(r"socket://127\.0\.0\.1:\d+", path) for kind, path in sources)
    assert sorted(live) == sorted(tiles) and min(live.values()) > 0


def test_mock_rig_history_and_live_without_posix_modules(tmp_path):
    out = tmp_path / "history"
    result = run_blocked("mock_rig", "history", "--animals", "2", "--days", "7", "--out", str(out))
    assert result.returncode == 0, result.stderr[-3000:]
    assert (out / "truth.json").is_file()
    assert len(list(out.glob("*.protocol.toml"))) == 2
    sessions = [p for p in out.iterdir() if p.name not in ("truth.json",) and not p.name.endswith(".toml")]
    assert len(sessions) >= 2 and all(p.stat().st_size > 0 for p in sessions)

    import serial  # pyserial's socket:// handler reads the live box, as SerialSource would

    proc = subprocess.Popen([sys.executable, "-c", BLOCKER, "mock_rig", "live", "--seconds", "20", "--speed", "20"],
                            stderr=subprocess.PIPE, stdout=subprocess.DEVNULL, text=True, cwd=ROOT)
    try:
        first = proc.stderr.readline()
        url = re.search(r"device (socket://127\.0\.0\.1:\d+)", first)
        assert url, first
        port = serial.serial_for_url(url.group(1), timeout=0.1)
        got, deadline = b"", time.monotonic() + 15
        while got.count(b"\n") < 5 and time.monotonic() < deadline:
            got += port.read(4096)
        port.close()
        assert got.startswith(b"# rigside-wire 1 "), got[:200]   # the box booted on open and sent its header
    finally:
        proc.terminate()
        proc.wait(30)
