"""The rig list (monitor.app.rigs) and `rigside window` on it: rigs restored, bad files named."""

from __future__ import annotations

import os
import sqlite3
import subprocess
import sys
from pathlib import Path

import pytest

from drivers.config import ConfigError
from drivers.wire import encode_event, encode_header
from monitor.app.rigs import append_rig, read_rigs
from monitor.ui.models import RigSetup

pytestmark = pytest.mark.slow  # windows, subprocesses or simulated histories: seconds per test

PROTOCOL = """[protocol]
name = "two-press 650 ms"
version = 1
task = "two_press"
target_ms = 650
tolerance = 0.2
"""

GOOD = """# our two boxes
[[rig]]
name = "box-01"
source = "serial"
path = "/dev/serial/by-id/usb-box01"
usb_serial = "A1B2"
protocol = "p.toml"
valve_ul_per_ms = 1.2

[[rig]]
name = "box-02"
source = "file"
path = "logs/box2.rsw"
protocol = "/lab/p.toml"
mapping = "m.toml"
"""


def test_rigs_are_read_with_paths_relative_to_the_file(tmp_path):
    path = tmp_path / "rigs.toml"
    path.write_text(GOOD)
    one, two = read_rigs(path)
    assert (one.name, one.kind, one.path, one.usb_serial, one.valve_ul_per_ms) == \
        ("box-01", "serial", "/dev/serial/by-id/usb-box01", "A1B2", 1.2)
    assert one.protocol_path == tmp_path / "p.toml" and one.mapping_path is None
    assert (two.path, two.protocol_path, two.mapping_path) == \
        (str(tmp_path / "logs" / "box2.rsw"), Path("/lab/p.toml"), tmp_path / "m.toml")
    assert read_rigs(tmp_path / "missing.toml") == []


@pytest.mark.parametrize("edit, line, key", [
    (('name = "box-02"', 'name = "box-01"'), 11, "name"),                # a rig twice
    (('mapping = "m.toml"', 'valve = 3'), 15, "valve"),                 # an unknown key
    (('source = "file"', 'source = "usb"'), 12, "source"),
    (('valve_ul_per_ms = 1.2', 'valve_ul_per_ms = 50'), 8, "valve_ul_per_ms"),
    (('protocol = "/lab/p.toml"', ''), 10, "protocol"),                 # missing: the table's first line
])
def test_a_bad_rig_list_names_file_line_and_key(tmp_path, edit, line, key):
    path = tmp_path / "rigs.toml"
    path.write_text(GOOD.replace(*edit))
    with pytest.raises(ConfigError) as caught:
        read_rigs(path)
    assert (caught.value.path, caught.value.line, caught.value.key) == (str(path), line, f"[[rig]] {key}")


def test_an_added_rig_is_appended_and_read_back_and_the_rest_is_kept(tmp_path):
    path = tmp_path / "conf" / "rigs.toml"
    setup = RigSetup("box-03", "file", str(tmp_path / "a \"quoted\" dir" / "box3.log"), None, None, 0.85,
                     str(tmp_path / "p.toml"))
    append_rig(path, setup)
    path.write_text(path.read_text() + "# a note the lab added by hand\n")
    append_rig(path, RigSetup("box-04", "serial", "COM7", "FT9X", str(tmp_path / "m.toml"), None,
                              str(tmp_path / "p.toml")))
    three, four = read_rigs(path)
    assert (three.name, three.kind, three.path, three.valve_ul_per_ms) == ("box-03", "file", setup.path, 0.85)
    assert (four.path, four.usb_serial, four.mapping_path, four.valve_ul_per_ms) == \
        ("COM7", "FT9X", tmp_path / "m.toml", None)
    assert "# a note the lab added by hand" in path.read_text()


def rigside(*args: str, home: Path, timeout: float = 120) -> subprocess.CompletedProcess:
    env = {**os.environ, "HOME": str(home), "XDG_CONFIG_HOME": str(home / ".config"),
           "QT_QPA_PLATFORM": "offscreen"}
    return subprocess.run([sys.executable, "-m", "monitor.app", *args], capture_output=True, text=True,
                          timeout=timeout, env=env)


def test_window_opens_with_the_listed_rigs_and_stores_what_they_sent(tmp_path):
    (tmp_path / "p.toml").write_text(PROTOCOL)
    log = tmp_path / "box1.rsw"
    log.write_bytes(encode_header(fw="test") + b"".join(encode_event(t * 1000, "lever_down") for t in range(7)))
    (tmp_path / "rigs.toml").write_text('[[rig]]\nname = "box-01"\nsource = "file"\npath = "box1.rsw"\n'
                                        'protocol = "p.toml"\nvalve_ul_per_ms = 1.2\n')
    shot = tmp_path / "window.png"
    done = rigside("window", "--rigs", str(tmp_path / "rigs.toml"), "--db", str(tmp_path / "lab.sqlite3"),
                   "--seconds", "3", "--screenshot", str(shot), home=tmp_path)
    assert done.returncode == 0, done.stderr
    assert shot.stat().st_size > 0
    with sqlite3.connect(tmp_path / "lab.sqlite3") as conn:   # plain sqlite3, not the store's code
        assert conn.execute("SELECT count(*) FROM events").fetchone()[0] == 7
        assert conn.execute("SELECT name, valve_ul_per_ms FROM rigs").fetchall() == [("box-01", 1.2)]


def test_window_refuses_a_bad_rig_list_in_one_line(tmp_path):
    (tmp_path / "rigs.toml").write_text('[[rig]]\nname = "box-01"\nsource = "file"\npath = "x"\n')
    done = rigside("window", "--rigs", str(tmp_path / "rigs.toml"), "--db", str(tmp_path / "lab.sqlite3"),
                   home=tmp_path)
    assert done.returncode == 2 and len(done.stderr.strip().splitlines()) == 1
    assert "rigs.toml:1" in done.stderr and "protocol" in done.stderr
    assert not (tmp_path / "lab.sqlite3").exists()


def test_a_serial_rig_that_does_not_reset_keeps_reset_false_and_reads_without_a_header(tmp_path):
    path = tmp_path / "rigs.toml"
    append_rig(path, RigSetup("box-08", "serial", "/dev/ttyACM8", None, None, None, str(tmp_path / "p.toml"),
                              reset=False))
    append_rig(path, RigSetup("box-09", "serial", "/dev/ttyACM9", None, None, None, str(tmp_path / "p.toml")))
    eight, nine = read_rigs(path)
    assert "reset = false" in path.read_text()
    assert (eight.wait_for_header, nine.wait_for_header) == (False, True)
    path.write_text(path.read_text().replace("reset = false", 'reset = "no"'))
    with pytest.raises(ConfigError) as caught:
        read_rigs(path)
    assert caught.value.key == "[[rig]] reset"


def test_window_refuses_a_rig_another_process_records_into_the_same_database(tmp_path):
    (tmp_path / "p.toml").write_text(PROTOCOL)
    log = tmp_path / "box1.rsw"
    log.write_bytes(encode_header(fw="test") + b"".join(encode_event(t * 1000, "lever_down") for t in range(7)))
    db = tmp_path / "lab.sqlite3"
    recorder = subprocess.Popen([sys.executable, "-m", "monitor.app", "record", "--source", f"file:{log}", "--rig",
                                 "box-01", "--animal", "heron", "--new-animal", "--protocol", str(tmp_path / "p.toml"),
                                 "--db", str(db), "--seconds", "60"], stderr=subprocess.PIPE, text=True)
    try:
        assert "reading from byte 0" in recorder.stderr.readline()  # the lock is taken before this line
        (tmp_path / "rigs.toml").write_text('[[rig]]\nname = "box-01"\nsource = "file"\npath = "box1.rsw"\n'
                                            'protocol = "p.toml"\n')
        done = rigside("window", "--rigs", str(tmp_path / "rigs.toml"), "--db", str(db), "--seconds", "3",
                       home=tmp_path)
    finally:
        recorder.terminate()
        recorder.communicate(timeout=30)
    assert done.returncode == 2 and len(done.stderr.strip().splitlines()) == 1, done.stderr
    assert "being recorded into this database by rigside record" in done.stderr
    with sqlite3.connect(db) as conn:  # each line once: the window stored nothing of it
        assert conn.execute("SELECT count(*) FROM events").fetchone()[0] == 7


def test_reading_the_rig_list_loads_no_qt():
    """The rig list, its RigSpec and protocol loading live outside the window: no PySide6, no pyqtgraph."""
    script = ("import sys, monitor.app.rigs as r; assert r.RigSpec and r.load_protocol; "
              "print(sorted(m for m in sys.modules if m.split('.')[0] in ('PySide6', 'shiboken6', 'pyqtgraph')))")
    done = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, timeout=60)
    assert done.returncode == 0, done.stderr
    assert done.stdout.strip() == "[]"
