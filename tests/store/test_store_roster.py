"""monitor.store.roster: an animal's current stage from its latest session."""

from __future__ import annotations

import sqlite3

from monitor.store.roster import latest_stages


def test_latest_stage_per_animal_skips_sessions_without_animal_or_stage():
    conn = sqlite3.connect(":memory:")     # a minimal sessions table written by hand, not by the store
    conn.execute("CREATE TABLE sessions (id INTEGER PRIMARY KEY, animal TEXT, stage TEXT, started_at REAL)")
    conn.executemany("INSERT INTO sessions (animal, stage, started_at) VALUES (?, ?, ?)", [
        ("alder", "shaping", 1.0), ("alder", "final", 3.0), ("alder", None, 4.0), ("birch", "shaping", 2.0),
        ("", "final", 5.0)])
    assert latest_stages(conn) == {"alder": "final", "birch": "shaping"}
    bare = sqlite3.connect(":memory:")
    bare.execute("CREATE TABLE sessions (id INTEGER PRIMARY KEY, animal TEXT, started_at REAL)")
    assert latest_stages(bare) == {}
