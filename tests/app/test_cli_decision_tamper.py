"""`rigside log verify` catches raw-SQL tampering with the stored decision log: an edited field, a deleted
entry, two swapped entries, a forged entry appended without the program, and a rewritten head."""

from __future__ import annotations

import hashlib
import json
import shutil
import sqlite3
import subprocess
import sys
from pathlib import Path

import pytest

from drivers.wire import encode_event, encode_header
from monitor.app.cli import main

PROTOCOL = """
[protocol]
name = "two-press 650 ms"
version = 1
task = "two_press"
target_ms = 650
tolerance = 0.2
"""


@pytest.fixture(scope="module")
def logged(tmp_path_factory) -> Path:
    """A store with one animal's session and four decisions made through `rigside decide`."""
    root = tmp_path_factory.mktemp("log")
    (root / "p.toml").write_text(PROTOCOL)
    session = root / "heron_s01.rsw"
    session.write_bytes(encode_header(start="2026-03-02T09:00:00+01:00") + encode_event(10, "lever_down")
                        + encode_event(650_010, "lever_down"))
    db = root / "store.sqlite3"
    assert main(["import", str(session), "--protocol", str(root / "p.toml"), "--db", str(db)]) == 0
    for i, decision in enumerate(("deferred", "deferred", "eligible", "excluded")):
        assert main(["decide", "--db", str(db), "--animal", "heron", "--decision", decision, "--operator", "ana",
                     "--reason", f"reason {i + 1}"]) == 0
    return db


def tampered(logged: Path, tmp_path: Path, *sql: str) -> Path:
    db = tmp_path / "copy.sqlite3"
    shutil.copy(logged, db)
    conn = sqlite3.connect(db)
    conn.execute("DROP TRIGGER decisions_no_update")  # the tamperer removes the store's own guard first
    conn.execute("DROP TRIGGER decisions_no_delete")
    for statement in sql:
        conn.execute(statement)
    conn.commit()
    conn.close()
    return db


def verify(db: Path, capsys, *extra: str) -> tuple[int, str]:
    code = main(["log", "verify", "--db", str(db), *extra])
    captured = capsys.readouterr()
    return code, captured.out + captured.err


def test_an_intact_log_verifies(logged, capsys):
    assert verify(logged, capsys) == (0, "4 entries, chain intact\n")


def test_an_edited_field_is_named(logged, tmp_path, capsys):
    db = tampered(logged, tmp_path, "UPDATE decisions SET reason = 'a better reason' WHERE seq = 2")
    code, text = verify(db, capsys)
    assert code == 1 and "entry 2" in text and "'reason' was edited" in text


def test_an_edited_snapshot_is_caught(logged, tmp_path, capsys):
    conn = sqlite3.connect(logged)
    snapshot = json.loads(conn.execute("SELECT snapshot FROM decisions WHERE seq = 3").fetchone()[0])
    conn.close()
    snapshot["figures"]["measures"]["hit_rate"] = 0.99
    db = tampered(logged, tmp_path, f"UPDATE decisions SET snapshot = '{json.dumps(snapshot)}' WHERE seq = 3")
    code, text = verify(db, capsys)
    assert code == 1 and "entry 3" in text and "snapshot" in text


def test_a_deleted_entry_is_caught(logged, tmp_path, capsys):
    db = tampered(logged, tmp_path, "DELETE FROM decisions WHERE seq = 2")
    code, text = verify(db, capsys)
    assert code == 1 and "entry 3 (position 2)" in text and "entry 2 missing" in text


def test_swapped_entries_are_caught(logged, tmp_path, capsys):
    columns = [r[1] for r in sqlite3.connect(logged).execute("PRAGMA table_info(decisions)") if r[1] != "id"]
    copy = ", ".join(f"{c} = (SELECT {c} FROM saved WHERE saved.id = 5 - decisions.id)" for c in columns)
    db = tampered(logged, tmp_path,
                  "CREATE TEMP TABLE saved AS SELECT * FROM decisions WHERE id IN (2, 3)",
                  "UPDATE decisions SET seq = -seq WHERE id IN (2, 3)",  # step around UNIQUE (seq)
                  f"UPDATE decisions SET {copy} WHERE id IN (2, 3)")
    order = [r[0] for r in sqlite3.connect(db).execute("SELECT seq FROM decisions ORDER BY id")]
    assert order == [1, 3, 2, 4]
    code, text = verify(db, capsys)
    assert code == 1 and "entry 3 (position 2)" in text and "out of order" in text


def test_a_forged_entry_appended_by_sql_is_caught(logged, tmp_path, capsys):
    conn = sqlite3.connect(logged)
    last_hash, payload = conn.execute("SELECT hash, payload FROM decisions WHERE seq = 4").fetchone()
    conn.close()
    content = json.loads(payload)
    content.update(seq=5, prev_hash=last_hash, decision="eligible", reason="forged")
    fake = hashlib.sha256(b"not the canonical payload").hexdigest()
    db = tampered(logged, tmp_path,
                  "INSERT INTO decisions (seq, prev_hash, algorithm, decision, animal, operator, reason, time, "
                  f"snapshot, disagrees_with_rule, payload, hash) VALUES (5, '{last_hash}', 'sha256', 'eligible', "
                  f"'heron', 'ana', 'forged', '{content['time']}', NULL, 0, '{json.dumps(content)}', '{fake}')")
    code, text = verify(db, capsys)
    assert code == 1 and "entry 5" in text and "hash" in text


def test_entries_removed_from_the_end_are_caught_by_an_exported_head(logged, tmp_path, capsys):
    assert main(["log", "head", "--db", str(logged)]) == 0
    head = capsys.readouterr().out.strip()
    db = tampered(logged, tmp_path, "DELETE FROM decisions WHERE seq = 4")
    assert verify(db, capsys)[0] == 0  # a shorter chain is still a chain ...
    code, text = verify(db, capsys, "--head", head)
    assert code == 1 and "entry 4" in text  # ... but not the one whose head was kept elsewhere


def test_verify_exit_code_from_a_real_process(logged, tmp_path):
    db = tampered(logged, tmp_path, "UPDATE decisions SET operator = 'mallory' WHERE seq = 1")
    result = subprocess.run([sys.executable, "-m", "monitor.app", "log", "verify", "--db", str(db)],
                            capture_output=True, text=True, timeout=60)
    assert result.returncode == 1
    assert len(result.stderr.strip().splitlines()) == 1 and "entry 1" in result.stderr
