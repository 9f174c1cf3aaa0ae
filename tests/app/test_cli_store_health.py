"""Database health through the CLI: a damaged page, an uncreatable or read-only place, a deleted file
while recording, and `rigside backup` while a recorder writes. SQLite itself (PRAGMA integrity_check,
sqlite.org/pragma.html) is the outside checker of every copy."""

from __future__ import annotations

import os
import shutil
import sqlite3
import subprocess
import sys
import time
from pathlib import Path

import pytest

from drivers.wire import encode_event, encode_header
from fixtures.devices import run_child as cli

PROTOCOL = '[protocol]\nname = "p"\nversion = 1\ntask = "two_press"\ntarget_ms = 650\ntolerance = 0.2\n'


def one_line_error(result: subprocess.CompletedProcess) -> bool:
    lines = result.stderr.strip().splitlines()
    return len(lines) == 1 and "Traceback" not in result.stderr and ": error: " in lines[0]


def lines(n: int, start: int = 0) -> bytes:
    return b"".join(encode_event(1000 * (start + i), "lever_down") for i in range(n))


def recorded_store(tmp_path: Path, n: int = 20000) -> tuple[Path, Path]:
    (tmp_path / "p.toml").write_text(PROTOCOL)
    log = tmp_path / "box.rsw"
    log.write_bytes(encode_header() + lines(n))
    db = tmp_path / "store.sqlite3"
    done = cli("record", "--source", f"file:{log}", "--rig", "b", "--animal", "a", "--new-animal", "--protocol",
               tmp_path / "p.toml", "--db", db, "--seconds", "1")
    assert done.returncode == 0, done.stderr
    return db, log


def damage(db: Path) -> None:
    """Overwrite a page of the events table's B-tree with noise (the file header stays valid)."""
    conn = sqlite3.connect(db)
    page_size = conn.execute("PRAGMA page_size").fetchone()[0]
    root = conn.execute("SELECT rootpage FROM sqlite_master WHERE name = 'events'").fetchone()[0]
    conn.close()
    with open(db, "r+b") as fh:
        fh.seek((root - 1) * page_size)
        fh.write(b"\x0d\xff\xee" * (page_size // 3))


@pytest.mark.slow  # a 20,000-event store, then every command in a child process
def test_a_damaged_page_is_refused_by_every_command_with_one_line(tmp_path):
    db, log = recorded_store(tmp_path)
    damage(db)
    protocol = tmp_path / "p.toml"
    other = tmp_path / "other_s01.rsw"
    other.write_bytes(encode_header() + lines(10))
    commands = [
        ("record", "--source", f"file:{log}", "--rig", "b", "--animal", "a", "--protocol", protocol, "--seconds", "1"),
        ("import", other, "--protocol", protocol, "--no-fit"),
        ("report", "--json"),
        ("export", "events", "--csv", tmp_path / "e.csv"),
        ("decide", "--animal", "a", "--decision", "deferred", "--operator", "o", "--reason", "r"),
        ("care", "sheet"),
        ("log", "verify"),
        ("backup", "--to", tmp_path / "copy.sqlite3"),
    ]
    for args in commands:
        result = cli(*args, "--db", db)
        assert result.returncode == 2 and one_line_error(result), (args[0], result.returncode, result.stderr)
        assert "damaged" in result.stderr or "malformed" in result.stderr, result.stderr
    assert not (tmp_path / "copy.sqlite3").exists()


def test_a_folder_that_cannot_be_created_is_one_line(tmp_path):
    blocker = tmp_path / "a-file"
    blocker.write_text("not a folder")
    result = cli("backup", "--db", tmp_path / "p.sqlite3", "--to", blocker / "sub" / "copy.sqlite3")
    assert result.returncode == 2 and one_line_error(result)
    (tmp_path / "p.toml").write_text(PROTOCOL)
    result = cli("record", "--source", f"file:{tmp_path / 'x.rsw'}", "--rig", "b", "--animal", "a", "--new-animal",
                 "--protocol", tmp_path / "p.toml", "--db", blocker / "sub" / "s.sqlite3", "--seconds", "0.2")
    assert result.returncode == 2 and one_line_error(result) and "cannot create the folder" in result.stderr


@pytest.mark.skipif(os.name != "posix" or os.geteuid() == 0, reason="root writes read-only folders anyway")
def test_a_read_only_folder_is_named_as_such(tmp_path):
    db, _ = recorded_store(tmp_path, 100)
    os.chmod(tmp_path, 0o555)
    try:
        result = cli("decide", "--db", db, "--animal", "a", "--decision", "deferred", "--operator", "o",
                     "--reason", "r", timeout=20)
    finally:
        os.chmod(tmp_path, 0o755)
    assert result.returncode == 2 and one_line_error(result) and "read-only" in result.stderr


def recording(tmp_path: Path, n: int) -> tuple[Path, Path, subprocess.Popen]:
    """`rigside record` in a child process following a log of `n` lines: (log, store, process)."""
    (tmp_path / "p.toml").write_text(PROTOCOL)
    log = tmp_path / "box.rsw"
    log.write_bytes(encode_header() + lines(n))
    db = tmp_path / "store.sqlite3"
    proc = subprocess.Popen([sys.executable, "-m", "monitor.app", "record", "--source", f"file:{log}", "--rig", "b",
                             "--animal", "a", "--new-animal", "--protocol", str(tmp_path / "p.toml"), "--db", str(db),
                             "--seconds", "60"], stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    return log, db, proc


@pytest.mark.slow
def test_deleting_the_database_while_recording_stops_the_recorder_with_exit_1(tmp_path):
    log, db, proc = recording(tmp_path, 100)
    deadline = time.monotonic() + 30
    while time.monotonic() < deadline and _count(db) < 100:
        time.sleep(0.05)
    assert _count(db) == 100
    for suffix in ("", "-wal", "-shm"):
        Path(f"{db}{suffix}").unlink(missing_ok=True)
    out, err = proc.communicate(timeout=30)
    assert proc.returncode == 1, err
    assert "deleted" in err and "recording stopped" in err
    assert "100 of 100 events read were not stored" in err and out.startswith("recorded 0 events")


def test_backup_while_recording_is_a_consistent_copy_holding_what_the_wal_holds(tmp_path):
    log, db, proc = recording(tmp_path, 5000)
    try:
        deadline = time.monotonic() + 30
        while time.monotonic() < deadline:
            if db.exists() and Path(f"{db}-wal").exists() and _count(db) >= 5000:
                break
            time.sleep(0.05)
        with open(log, "ab") as fh:  # the recorder goes on writing during the backup
            fh.write(lines(5000, start=5000))
        copied = cli("backup", "--db", db, "--to", tmp_path / "b" / "copy.sqlite3")
        plain = tmp_path / "plain.sqlite3"
        shutil.copyfile(db, plain)  # what a file manager would copy: the main file only
    finally:
        proc.terminate()
        proc.communicate(timeout=30)
    assert copied.returncode == 0, copied.stderr
    copy = sqlite3.connect(tmp_path / "b" / "copy.sqlite3")
    assert copy.execute("PRAGMA integrity_check").fetchall() == [("ok",)]  # SQLite's own full check
    held = copy.execute("SELECT count(*) FROM events").fetchone()[0]
    copy.close()
    assert 5000 <= held <= 10000 and f"{held} events" in copied.stdout
    assert _count(db) == 10000
    again = cli("backup", "--db", db, "--to", tmp_path / "b" / "copy.sqlite3")
    assert again.returncode == 2 and one_line_error(again) and "already exists" in again.stderr


def _count(db: Path) -> int:
    try:
        conn = sqlite3.connect(f"file:{db}?mode=ro", uri=True, timeout=5)
        try:
            return conn.execute("SELECT count(*) FROM events").fetchone()[0]
        finally:
            conn.close()
    except sqlite3.Error:
        return 0


def _backup(db: str, target: str) -> int:
    from monitor.app.cli import main

    return main(["backup", "--db", db, "--to", target])


def test_two_backups_to_one_new_name_at_once_never_overwrite_each_other(tmp_path):
    from fixtures.races import together

    db = tmp_path / "store.sqlite3"
    log = tmp_path / "box.rsw"
    log.write_bytes(encode_header() + lines(200))
    (tmp_path / "p.toml").write_text(PROTOCOL)
    imported = cli("import", log, "--animal", "a", "--protocol", tmp_path / "p.toml", "--db", db, "--no-fit")
    assert imported.returncode == 0, imported.stderr
    for attempt in range(3):
        target = tmp_path / f"copy{attempt}.sqlite3"
        answers = together(_backup, (str(db), str(target)), 2)
        assert sorted(answers) == [0, 2], answers   # one copy takes the name, the other is refused (exit 2)
        with sqlite3.connect(target) as conn:   # plain sqlite3: the one copy is whole
            assert conn.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
        assert sorted(p.name for p in tmp_path.iterdir() if p.name.startswith((".copy", "copy"))) == \
            [f"copy{i}.sqlite3" for i in range(attempt + 1)]   # no twin left behind
