"""The events CSV streamed a block at a time: sessions whose events interleave in the store (rigs recorded side
by side) give each event the same row however the blocks fall, csv reads every row back, and the memory held
does not grow with the number of events."""

from __future__ import annotations

import csv
import sqlite3
import tracemalloc
from pathlib import Path

import pytest

from mock_rig.history import cohort, write_history
from monitor.app.cli import main
from monitor.store.csv_export import EVENT_COLUMNS, write_events_csv
from monitor.store.db import open_store


def imported(folder: Path, days: int) -> Path:
    write_history(folder / "h", cohort(2, seed=1), days=days)
    db = folder / "store.sqlite3"
    for animal in ("alder", "birch"):
        assert main(["import", *map(str, sorted((folder / "h").glob(f"{animal}_s*.rsw"))), "--protocol",
                     str(folder / "h" / f"{animal}.protocol.toml"), "--db", str(db), "--no-fit", "--quiet"]) == 0
    return db


@pytest.fixture(scope="module")
def store(tmp_path_factory) -> Path:
    return imported(tmp_path_factory.mktemp("csv"), days=2)


def rows(path: Path) -> list[list[str]]:
    with open(path, newline="", encoding="utf-8") as f:  # the csv module reads what was written
        return list(csv.reader(f))


@pytest.mark.slow
def test_interleaved_sessions_and_any_block_size_give_each_event_the_same_row(store, tmp_path):
    conn = open_store(store, readonly=True)
    write_events_csv(conn, tmp_path / "straight.csv")
    conn.close()
    # the same events stored interleaved, as rigs recorded side by side store them: session by session
    # becomes every session's k-th event in turn
    mixed = tmp_path / "mixed.sqlite3"
    with sqlite3.connect(store) as source:
        source.execute("VACUUM INTO ?", (str(mixed),))
    with sqlite3.connect(mixed) as db:
        db.execute("CREATE TABLE original AS SELECT rowid AS old, * FROM events")
        db.execute("DELETE FROM events")
        db.execute("INSERT INTO events (session_id, segment, line, t_us, raw_time, code, value, wall) "
                   "SELECT session_id, segment, line, t_us, raw_time, code, value, wall FROM original "
                   "ORDER BY row_number() OVER (PARTITION BY session_id ORDER BY old), session_id")
        db.execute("UPDATE sessions SET first_event = NULL, last_event = NULL")
        db.execute("DROP TABLE original")
    straight = rows(tmp_path / "straight.csv")
    assert straight[0] == list(EVENT_COLUMNS) and len(straight) > 1000
    sessions = {r[1] for r in straight[1:]}
    assert len(sessions) == 4
    conn = open_store(mixed, readonly=True)
    for block_rows in (1, 7, 1000, 100_000):
        written = write_events_csv(conn, tmp_path / f"mixed-{block_rows}.csv", block_rows=block_rows)
        got = rows(tmp_path / f"mixed-{block_rows}.csv")
        assert written == len(straight) - 1 and got[0] == straight[0]
        assert sorted(map(tuple, got[1:])) == sorted(map(tuple, straight[1:]))  # the same rows, whatever the order
        assert [r[1] for r in got[1:6]] == sorted(sessions, key=int)[:4] + [sorted(sessions, key=int)[0]]
    conn.close()


def test_memory_does_not_grow_with_the_number_of_events(tmp_path):
    peaks, counts = [], []
    for days in (1, 4):
        db = imported(tmp_path / f"d{days}", days=days)
        conn = open_store(db, readonly=True)
        write_events_csv(conn, tmp_path / "warm.csv", block_rows=500)  # imports and caches before measuring
        tracemalloc.start()
        counts.append(write_events_csv(conn, tmp_path / f"events-{days}.csv", block_rows=500))
        peaks.append(tracemalloc.get_traced_memory()[1])
        tracemalloc.stop()
        conn.close()
    assert counts[1] > 3 * counts[0]
    print(f"events {counts}, tracemalloc peaks {peaks} bytes")
    assert peaks[1] < 1.3 * peaks[0], (counts, peaks)  # four times the events, about the same memory
