"""monitor.store.rows: event rows inserted several to a statement are the rows, in order, that one INSERT per
row (sqlite3's executemany, the reference) stores."""

from __future__ import annotations

import sqlite3

import pytest

from monitor.store.rows import EVENT_COLUMNS, ROWS_PER_STATEMENT, event_sql, insert_rows


def _table(conn: sqlite3.Connection) -> None:
    conn.execute(f"CREATE TABLE events (session_id INTEGER NOT NULL, {', '.join(EVENT_COLUMNS)})")
    conn.execute("CREATE TABLE raw_lines (session_id INTEGER, line INTEGER, byte_offset INTEGER, kind TEXT, "
                 "reason TEXT, raw BLOB)")


@pytest.mark.parametrize("count", [0, 1, ROWS_PER_STATEMENT - 1, ROWS_PER_STATEMENT, 2 * ROWS_PER_STATEMENT + 7])
def test_rows_inserted_several_to_a_statement_are_those_of_one_insert_each_in_order(count):
    rows = [(i // 40, i + 1, 1_000_000_007 * i, i % 65536, 3 + i % 5, None if i % 3 else f"{i} 0",
             None if i % 2 else "2026-02-03T09:00:00+01:00") for i in range(count)]
    ours, reference = sqlite3.connect(":memory:"), sqlite3.connect(":memory:")
    for conn in (ours, reference):
        _table(conn)
    insert_rows(ours, 7, rows, [(1, 0, "comment", None, b"# one")])
    reference.executemany(event_sql(7), rows)
    query = f"SELECT rowid, session_id, {', '.join(EVENT_COLUMNS)} FROM events ORDER BY rowid"
    assert ours.execute(query).fetchall() == reference.execute(query).fetchall()
    assert ours.execute("SELECT session_id, kind, raw FROM raw_lines").fetchall() == [(7, "comment", b"# one")]
