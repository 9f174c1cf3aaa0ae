"""`rigside demo`: simulated boxes through the real serial (or file) path, the store and the window."""

from __future__ import annotations

import json
import os
import signal
import sqlite3
import struct
import subprocess
import sys
import time
from pathlib import Path

import pytest


pytestmark = pytest.mark.slow  # a headless window run each: seconds per test


def png_size(path: Path) -> tuple[int, int]:
    """Width and height from a PNG's IHDR chunk (PNG specification, ISO/IEC 15948: bytes 16-24)."""
    data = path.read_bytes()[:24]
    assert data[:8] == b"\x89PNG\r\n\x1a\n"
    return struct.unpack(">II", data[16:24])


def stored_events(db: Path) -> tuple[int, int]:
    """Events recorded live (sessions of a source, not imported history) and sessions left open."""
    with sqlite3.connect(db) as conn:       # read with plain sqlite3, not the project's store code
        events = conn.execute("SELECT count(*) FROM events e JOIN sessions s ON s.id = e.session_id "
                              "WHERE s.animal != '' AND s.source_id IS NOT NULL").fetchone()[0]
        open_sessions = conn.execute("SELECT count(*) FROM sessions WHERE ended_at IS NULL").fetchone()[0]
    return events, open_sessions


DEMO_IN_CHILD = """
import json, sys
from pathlib import Path
from monitor.app.window.demo import DemoOptions, run
from monitor.app.settings import care_config
seen = {}
def inspect(controller, window):
    seen["tiles"] = {rig: [controller.board.state(rig).animal, controller.board.state(rig).trials_today]
                     for rig in controller.board.rigs()}
    seen["kinds"] = sorted({r.spec.kind for r in controller.rigs.values()})
    seen["size"] = [window.width(), window.height()]
    seen["minimum"] = controller.decisions_and_care.config.daily_minimum_ml
code = run(DemoOptions(speed=20, seconds=3, headless=True, folder=Path(sys.argv[1]), fit=False,
                       files=sys.argv[2] == "files", history=(1, 2, 3, 4),
                       care=care_config(Path(sys.argv[3]))), inspect)
print(json.dumps({"code": code, **seen}))
"""


@pytest.mark.parametrize("files", [False, True], ids=["serial", "file"])
def test_the_demo_shows_trials_arriving_and_stores_them(tmp_path, files):
    # In a child process: a whole application run must not leave Qt state behind for other tests.
    (tmp_path / "lab.toml").write_text("[care]\ndaily_minimum_ml = 2.5\n")
    result = subprocess.run([sys.executable, "-c", DEMO_IN_CHILD, str(tmp_path), "files" if files else "serial",
                             str(tmp_path / "lab.toml")],
                            capture_output=True, text=True, timeout=180,
                            env={**os.environ, "QT_QPA_PLATFORM": "offscreen"})
    assert result.returncode == 0, result.stderr[-2000:]
    seen = json.loads(result.stdout.strip().splitlines()[-1])
    assert seen["code"] == 0
    tiles = seen["tiles"]
    assert sorted(tiles) == ["box1", "box2", "box3", "box4"]
    assert {animal for animal, _ in tiles.values()} == {"alder", "birch", "cedar", "damson"}
    assert all(trials > 0 for _, trials in tiles.values())
    assert seen["kinds"] == (["file"] if files else ["serial"])
    events, open_sessions = stored_events(tmp_path / "demo.sqlite3")
    assert events > 0 and open_sessions == 0                 # every session was ended on close
    assert seen["size"] == [1366, 768]
    assert seen["minimum"] == 2.5                            # the lab's [care] thresholds reach the window


def test_headless_screenshot_command(tmp_path):
    shot = tmp_path / "x.png"
    env = {k: v for k, v in os.environ.items() if k != "QT_QPA_PLATFORM"}   # --headless sets it
    result = subprocess.run([sys.executable, "-m", "monitor.app", "demo", "--headless", "--seconds", "5",
                             "--screenshot", str(shot), "--folder", str(tmp_path / "demo"), "--no-fit"],
                            capture_output=True, text=True, timeout=180, env=env)
    assert result.returncode == 0, result.stderr
    assert png_size(shot) == (1366, 768)


@pytest.mark.skipif(os.name != "posix", reason="on Windows send_signal(SIGTERM) terminates the process outright")
def test_sigterm_closes_cleanly(tmp_path):
    folder = tmp_path / "demo"
    proc = subprocess.Popen([sys.executable, "-m", "monitor.app", "demo", "--headless", "--seconds", "120",
                             "--folder", str(folder), "--no-fit", "--speed", "20", "--history", "1,1,1,1"],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    db = folder / "demo.sqlite3"
    try:
        deadline = time.monotonic() + 90
        while time.monotonic() < deadline:
            if db.exists():
                try:
                    if stored_events(db)[0] > 0:
                        break
                except sqlite3.OperationalError:
                    pass
            time.sleep(0.2)
        proc.send_signal(signal.SIGTERM)
        out, err = proc.communicate(timeout=60)
    finally:
        proc.kill()
    assert proc.returncode == 0, err
    events, open_sessions = stored_events(db)
    assert events > 0 and open_sessions == 0
    assert "trials per box" in err


def test_bad_options_exit_2(tmp_path):
    bad = tmp_path / "lab.toml"
    bad.write_text('[care]\nend_of_day = "17:00"\ndaily_minimum_ml = "lots"\n')
    for argv, words in ((["--headless"], "needs --seconds"), (["--history", "1,2"], "--history"),
                        (["--speed", "0", "--seconds", "1"], "--speed"),
                        (["--settings", str(bad), "--seconds", "1"], f"--settings: {bad}:3")):
        result = subprocess.run([sys.executable, "-m", "monitor.app", "demo", *argv],
                                capture_output=True, text=True, timeout=60)
        assert result.returncode == 2 and words in result.stderr


def test_the_temporary_demo_folder_is_removed_at_the_end(tmp_path):
    temp = tmp_path / "temp"
    temp.mkdir()
    env = {**os.environ, "TMPDIR": str(temp), "TEMP": str(temp), "TMP": str(temp)}   # tempfile's lookup order
    result = subprocess.run([sys.executable, "-m", "monitor.app", "demo", "--headless", "--seconds", "3", "--no-fit",
                             "--history", "1,1,1,1"], capture_output=True, text=True, timeout=180, env=env)
    assert result.returncode == 0, result.stderr
    used = next(line for line in result.stderr.splitlines() if "files in" in line)
    assert str(temp) in used                       # the demo did work in that temp folder ...
    assert not list(temp.glob("rigside-demo-*"))   # ... and left nothing of its own there
