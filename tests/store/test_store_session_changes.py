"""monitor.store.session_changes: unattended runs given to an animal, exclusions undone, every change logged."""

from __future__ import annotations

import importlib.util
import sqlite3
from pathlib import Path

import pytest

from monitor.store.registry import RecordError, ensure_protocol
from monitor.store.reporting import report
from monitor.store.session_changes import changes_of, give_run, set_excluded, unattended_runs

spec = importlib.util.spec_from_file_location("store_registry_tests", Path(__file__).with_name("test_store_registry.py"))
records_tests = importlib.util.module_from_spec(spec)
spec.loader.exec_module(records_tests)


def unattended(conn, tmp_path) -> int:
    """A recorded session made into a run of no animal (as a box streaming with nobody checked in leaves it)."""
    session_id = records_tests.import_sessions(conn, tmp_path, "heron", [7])[0]
    conn.execute("UPDATE sessions SET animal = '', animal_id = NULL, protocol_id = NULL WHERE id = ?", (session_id,))
    conn.execute("DELETE FROM trials WHERE session_id = ?", (session_id,))
    return session_id


def test_an_unattended_run_is_listed_then_given_to_an_animal_once_and_logged(tmp_path):
    conn = records_tests.store(tmp_path)
    run = unattended(conn, tmp_path)
    found = unattended_runs(conn)
    assert [(r.session_id, r.presses, r.ended) for r in found] == [(run, 20, True)]   # 10 trials x 2 presses
    pid = ensure_protocol(conn, "two-press 650 ms", 1, records_tests.PROTOCOL)
    with pytest.raises(RecordError, match="reason"):
        give_run(conn, run, animal="newt", operator="ana", reason=" ", protocol_id=pid)
    trials = give_run(conn, run, animal="newt", operator="ana", reason="box ran before check-in", protocol_id=pid)
    assert trials == 10 and unattended_runs(conn) == []
    entry = report(conn, "newt")["animals"][0]
    assert entry["sessions"][0]["trials"] == 10 and entry["sessions"][0]["hits"] == 7     # the file's own count
    assert [c[:4] for c in changes_of(conn, run)] == [("given", "newt", "box ran before check-in", "ana")]
    with pytest.raises(RecordError, match="already belongs to newt"):
        give_run(conn, run, animal="wren", operator="ana", reason="again", protocol_id=pid)


def test_a_running_run_cannot_be_given(tmp_path):
    conn = records_tests.store(tmp_path)
    run = unattended(conn, tmp_path)
    conn.execute("UPDATE sessions SET ended_at = NULL WHERE id = ?", (run,))
    pid = ensure_protocol(conn, "two-press 650 ms", 1, records_tests.PROTOCOL)
    with pytest.raises(RecordError, match="still running"):
        give_run(conn, run, animal="newt", operator="ana", reason="r", protocol_id=pid)


def test_an_exclusion_is_undone_with_a_reason_and_the_log_refuses_rewrites(tmp_path):
    conn = records_tests.store(tmp_path)
    ids = records_tests.import_sessions(conn, tmp_path, "heron", [8, 8])
    set_excluded(conn, ids[0], True, reason="cable fault", operator="ana")
    assert report(conn, "heron")["animals"][0]["sessions"][0]["excluded"]
    with pytest.raises(RecordError, match="reason"):
        set_excluded(conn, ids[0], False, reason="", operator="ana")
    set_excluded(conn, ids[0], False, reason="cable was fine after all", operator="bo")
    assert not report(conn, "heron")["animals"][0]["sessions"][0]["excluded"]
    assert [c[0] for c in changes_of(conn, ids[0])] == ["excluded", "included"]
    with pytest.raises(sqlite3.DatabaseError, match="append-only"):
        conn.execute("UPDATE session_changes SET reason = 'x'")
    with pytest.raises(sqlite3.DatabaseError, match="append-only"):
        conn.execute("DELETE FROM session_changes")
