"""`rigside manipulation` and `rigside effects` on a small store of four sessions: the fast loop's test of both
commands (tests/app/test_cli_effects.py checks them on a simulated cohort, marked slow)."""

from __future__ import annotations

import json
import sqlite3
from datetime import datetime, timedelta, timezone

from fixtures.devices import run_main
from fixtures.protocols import protocol_toml
from fixtures.stores import imported_store, rewarded_session

ADD = ("manipulation", "add", "--animal", "heron", "--acute", "--what", "muscimol M1", "--operator", "kim",
       "--reason", "as planned")


def small_store(folder):
    start = datetime(2026, 3, 2, 9, tzinfo=timezone.utc)
    sessions = {f"heron_s{k:02d}.rsw": rewarded_session(start + timedelta(days=k), 30) for k in range(1, 5)}
    return imported_store(folder, sessions, protocol_toml(), "--no-fit")


def test_a_manipulation_is_recorded_listed_and_its_effect_reported(tmp_path, capsys):
    db = small_store(tmp_path)
    code, _, err = run_main(capsys, *ADD, "--session", 3, "--db", db)
    assert code == 0, err
    # SQLite itself reads back the row the command wrote
    rows = sqlite3.connect(db).execute("SELECT what FROM manipulations").fetchall()
    assert rows == [("muscimol M1",)]
    code, out, _ = run_main(capsys, "manipulation", "list", "--db", db, "--json")
    assert code == 0 and json.loads(out)["chain"] == "ok"  # the json module parses the listing
    code, out, err = run_main(capsys, "effects", "--db", db, "--json")
    assert code == 0, err
    (entry,) = json.loads(out)["manipulations"]
    # every trial of every session is a rewarded 650 ms pair, so sessions 1-2 and 3 hit alike: no effect
    assert entry["effect"]["baseline_sessions"] == [1, 2] and entry["effect"]["affected_sessions"] == [3]
    assert entry["effect"]["vs_baseline"]["hit_rate"]["effect"] == 0.0


def test_a_session_that_does_not_exist_is_one_line_exit_2_and_writes_nothing(tmp_path, capsys):
    db = small_store(tmp_path)
    code, _, err = run_main(capsys, *ADD, "--session", 99, "--db", db)
    assert code == 2 and len(err.strip().splitlines()) == 1 and "--session" in err, err
    assert sqlite3.connect(db).execute("SELECT count(*) FROM manipulations").fetchone() == (0,)
