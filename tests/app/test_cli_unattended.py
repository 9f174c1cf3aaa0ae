"""`rigside unattended list|give`: a box's run with nobody checked in, given to an animal from the command line."""

from __future__ import annotations

import importlib.util
import sqlite3
from pathlib import Path

import pytest

from monitor.app.errors import plain_error
from monitor.store.db import open_store
from fixtures.devices import run_main as run_cli

spec = importlib.util.spec_from_file_location("store_registry_cli", Path(__file__).parents[1] / "store" /
                                              "test_store_registry.py")
records_tests = importlib.util.module_from_spec(spec)
spec.loader.exec_module(records_tests)


def store_with_a_run(tmp_path) -> tuple[Path, str]:
    conn = open_store(tmp_path / "store.sqlite3")
    session_id = records_tests.import_sessions(conn, tmp_path, "heron", [6, 7])[1]
    conn.execute("UPDATE sessions SET animal = '', animal_id = NULL WHERE id = ?", (session_id,))
    start = conn.execute("SELECT start_wall FROM sessions WHERE id = ?", (session_id,)).fetchone()[0]
    conn.close()
    return tmp_path / "store.sqlite3", start[:16].replace("T", " ")


def test_list_then_give_a_run_to_an_animal(tmp_path, capsys):
    db, started = store_with_a_run(tmp_path)
    code, out, err = run_cli(capsys, "unattended", "list", "--db", db)
    assert code == 0 and out.strip().endswith("ended  20 presses or trials") and started in out
    code, out, err = run_cli(capsys, "unattended", "give", "--db", db, "--rig", "", "--started", started,
                             "--animal", "heron", "--operator", "ana", "--reason", " ")
    assert code == 2 and err.count("\n") == 1 and "--rig" in err
    rig = sqlite3.connect(db).execute("SELECT rig FROM sessions WHERE animal = ''").fetchone()[0]
    code, out, err = run_cli(capsys, "unattended", "give", "--db", db, "--rig", rig, "--started", "1999-01-01",
                             "--animal", "heron", "--operator", "ana", "--reason", "late check-in")
    assert code == 2 and "no run with nobody checked in" in err and err.count("\n") == 1
    code, out, err = run_cli(capsys, "unattended", "give", "--db", db, "--rig", rig, "--started", started,
                             "--animal", "heron", "--operator", "ana", "--reason", "late check-in")
    assert code == 0 and out.startswith("10 trials from") and "heron" in out     # 10 trials in the file
    with sqlite3.connect(db) as conn:       # plain sqlite3, not the store's code
        assert conn.execute("SELECT count(*) FROM sessions WHERE animal = 'heron'").fetchone()[0] == 2
        assert conn.execute("SELECT change, operator FROM session_changes").fetchall() == [("given", "ana")]
    code, out, err = run_cli(capsys, "unattended", "list", "--db", db)
    assert code == 0 and out.strip() == "No box has run with nobody checked in."


def test_a_missing_file_reads_as_words_not_an_errno():
    try:
        open("/nonexistent/rigs.toml")
    except OSError as exc:
        text = plain_error(exc)
    assert "[Errno" not in text and text == "No such file or directory: /nonexistent/rigs.toml"


def test_the_text_report_names_each_sessions_stage_and_counts_in_words(tmp_path, capsys):
    conn = open_store(tmp_path / "store.sqlite3")
    records_tests.import_sessions(conn, tmp_path, "heron", [6])
    conn.close()
    code, out, err = run_cli(capsys, "report", "--db", tmp_path / "store.sqlite3")
    lines = out.strip().splitlines()
    assert code == 0 and "1 session;" in lines[0]
    # the protocol has no [[stages]]: its one stage is "main" (docs/protocol.md); 6 of 10 trials at 650 ms hit
    assert "stage main" in lines[1] and "hit rate 0.60" in lines[1] and "CV " in lines[1]


@pytest.mark.slow
def test_record_names_the_session_by_the_animals_own_count(tmp_path):
    import subprocess
    import sys

    conn = open_store(tmp_path / "store.sqlite3")
    records_tests.import_sessions(conn, tmp_path, "heron", [6, 7])          # sessions 1 and 2 of heron
    conn.close()
    (tmp_path / "p.toml").write_text(records_tests.PROTOCOL)
    (tmp_path / "live.rsw").write_bytes(b"# rigside-wire 1 clock=ms\n1000 lever_down\n1100 lever_up\n")
    result = subprocess.run([sys.executable, "-m", "monitor.app", "record", "--source", f"file:{tmp_path / 'live.rsw'}",
                             "--rig", "box1", "--animal", "heron", "--protocol", tmp_path / "p.toml", "--db",
                             tmp_path / "store.sqlite3", "--seconds", "1"], capture_output=True, text=True, timeout=120)
    assert result.returncode == 0, result.stderr
    assert "(session 3 of heron)" in result.stdout
