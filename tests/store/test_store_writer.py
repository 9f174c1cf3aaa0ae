"""monitor.store: schema checks and migrations, and the single writer under locks, a full disk and overflow."""

from __future__ import annotations

import hashlib
import json
import sqlite3
import time
from pathlib import Path

import pytest

from drivers.status import Batch, FilePosition, Gap
from drivers.wire import WireDecoder, encode_event, encode_header
from monitor.store import db
from monitor.store.schema import APPLICATION_ID, MIGRATIONS, SCHEMA_VERSION, Migration
from monitor.store.writer import HOLDING, OK, OVERFLOW, StoreWriter
from fixtures.races import together
from fixtures.sessions import wait_for


def digest(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def batch_of(n: int, start: int = 0, decoder: WireDecoder | None = None, resume: FilePosition | None = None) -> Batch:
    decoder = decoder or WireDecoder()
    data = b"".join(encode_event(start + i, "lever_down") for i in range(n))
    return Batch(decoder.feed(data), time.time(), resume=resume)


@pytest.fixture
def writer(tmp_path):
    made: list[StoreWriter] = []

    def make(**kwargs) -> StoreWriter:
        w = StoreWriter(tmp_path / "store.sqlite3", **kwargs)
        w.start()
        made.append(w)
        return w

    yield make
    for w in made:
        w.stop(timeout=2.0)


def setup_session(w: StoreWriter, kind: str = "file", path: str = "/x/box.rsw") -> tuple[int, int]:
    source_id = w.call(lambda c: db.register_source(c, kind, path, "rig1"))
    session_id = w.call(lambda c: db.start_session(c, source_id, "heron", "rig1", "p", 1, "[protocol]"))
    return source_id, session_id


def read(path: Path, sql: str, args=()):
    conn = sqlite3.connect(path)
    try:
        return conn.execute(sql, args).fetchall()
    finally:
        conn.close()


# --- opening and migrations ------------------------------------------------------------


def test_new_store_has_the_current_version_wal_and_v1_tables(tmp_path):
    conn = db.open_store(tmp_path / "new" / "s.sqlite3")
    try:
        assert conn.execute("PRAGMA user_version").fetchone()[0] == SCHEMA_VERSION
        assert conn.execute("PRAGMA application_id").fetchone()[0] == APPLICATION_ID
        assert conn.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
        assert conn.execute("PRAGMA synchronous").fetchone()[0] == 2  # FULL (sqlite.org/pragma.html#pragma_synchronous)
        tables = {r[0] for r in conn.execute("SELECT name FROM sqlite_master WHERE type = 'table'")}
        assert {"sources", "sessions", "events", "raw_lines", "gaps", "file_offsets", "event_codes"} <= tables
        indexes = conn.execute("SELECT name FROM sqlite_master WHERE type = 'index' AND tbl_name = 'events'").fetchall()
        assert indexes == []  # the hot table stays lean during ingest
    finally:
        conn.close()


def test_a_newer_version_is_refused_and_left_unchanged(tmp_path):
    path = tmp_path / "s.sqlite3"
    db.open_store(path).close()
    conn = sqlite3.connect(path)
    conn.execute(f"PRAGMA user_version = {SCHEMA_VERSION + 5}")
    conn.close()
    before = digest(path)
    with pytest.raises(db.StoreError, match="newer rigside") as caught:
        db.open_store(path)
    assert "\n" not in str(caught.value) and str(path) in str(caught.value)
    assert digest(path) == before


@pytest.mark.parametrize("content", [b"this is not a database at all" * 100, b"SQLite format 3\x00" + b"\xff" * 4000])
def test_a_corrupt_file_is_refused_and_never_overwritten(tmp_path, content):
    path = tmp_path / "s.sqlite3"
    path.write_bytes(content)
    with pytest.raises(db.StoreError, match="left unchanged"):
        db.open_store(path)
    assert path.read_bytes() == content


def test_another_programs_database_is_refused(tmp_path):
    path = tmp_path / "other.sqlite3"
    conn = sqlite3.connect(path)
    conn.execute("CREATE TABLE accounts (id INTEGER)")
    conn.commit()
    conn.close()
    before = digest(path)
    with pytest.raises(db.StoreError, match="another program"):
        db.open_store(path)
    assert digest(path) == before


def test_forward_migration_keeps_data_and_a_failed_one_rolls_back(tmp_path):
    path = tmp_path / "s.sqlite3"
    conn = db.open_store(path)
    source = db.register_source(conn, "file", "/a", "rig")
    conn.close()
    v2 = Migration("add a note column", ("ALTER TABLE sources ADD COLUMN note TEXT",
                                          "UPDATE sources SET note = 'migrated'"))
    conn = db.open_store(path, migrations=MIGRATIONS + (v2,))
    assert conn.execute("PRAGMA user_version").fetchone()[0] == SCHEMA_VERSION + 1
    assert conn.execute("SELECT id, note FROM sources").fetchall() == [(source, "migrated")]
    conn.close()
    db.open_store(path, migrations=MIGRATIONS + (v2,)).close()  # already there: nothing runs twice

    broken = Migration("broken", ("CREATE TABLE half_done (x)", "THIS IS NOT SQL"))
    with pytest.raises(db.StoreError):
        db.open_store(path, migrations=MIGRATIONS + (v2, broken))
    assert read(path, "PRAGMA user_version") == [(SCHEMA_VERSION + 1,)]
    assert read(path, "SELECT name FROM sqlite_master WHERE name = 'half_done'") == []
    # and the older program now refuses the file it cannot understand, without touching it
    with pytest.raises(db.StoreError, match="newer"):
        db.open_store(path)


def _open_and_close(path: str) -> str:
    db.open_store(path).close()
    return "opened"


def test_processes_creating_one_new_store_at_once_all_open_it(tmp_path):
    # two recorders started together on a new database: SQLite refuses a journal-mode change at once
    # ("database is locked") while another connection reads the file, and a check made of three reads
    # can see the other process's first commit between them ("another program")
    for attempt in range(15):
        path = str(tmp_path / f"new{attempt}.sqlite3")
        got = together(_open_and_close, (path,), 3, expected=(db.StoreError,))
        assert got == ["opened"] * 3, (attempt, got)
        assert read(Path(path), "PRAGMA user_version") == [(SCHEMA_VERSION,)]


# --- the writer ------------------------------------------------------------------------


def test_batches_are_committed_while_running_with_their_file_position(writer, tmp_path):
    w = writer()
    source_id, session_id = setup_session(w)
    decoder = WireDecoder()
    data = encode_header(fw="x") + b"".join(encode_event(i * 10, "lick") for i in range(50)) + b"oops\n" \
        + encode_event(999, "strange_word", "a", "b")
    records = decoder.feed(data)
    position = FilePosition(decoder.offset, (1, 2), "f" * 64, 10, {"kind": "wire", "line": decoder.line})
    w.submit(Batch(records, time.time(), resume=position, gaps=(Gap(1.0, 2.0, "test gap"),)),
             source_id=source_id, session_id=session_id, live=False)
    wait_for(lambda: w.status().committed_events == 51, what="commit without stop")
    path = tmp_path / "store.sqlite3"
    rows = read(path, "SELECT e.raw_time, c.name, e.value FROM events e JOIN event_codes c USING (code) ORDER BY e.rowid")
    assert rows[:2] == [(0, "lick", None), (10, "lick", None)] and rows[-1] == (999, "strange_word", "a b")
    raw = read(path, "SELECT kind, reason, raw FROM raw_lines ORDER BY rowid")
    assert raw[0][0] == "header" and raw[0][2] == encode_header(fw="x").rstrip(b"\n")
    assert raw[1] == ("malformed", "expected TIME EVENT [ARGS...]", b"oops")
    stored = read(path, "SELECT byte_offset, decoder FROM file_offsets WHERE source_id = ?", (source_id,))
    assert stored[0][0] == len(data) and json.loads(stored[0][1])["line"] == 53
    assert read(path, "SELECT start_at, end_at, reason FROM gaps") == [(1.0, 2.0, "test gap")]
    assert read(path, "SELECT known FROM event_codes WHERE name = 'strange_word'") == [(0,)]


def test_locked_database_holds_rows_in_memory_then_stores_them_once(writer, tmp_path):
    w = writer(retry_s=0.05, busy_timeout_ms=50)
    source_id, session_id = setup_session(w, "serial", "/dev/rig")
    other = sqlite3.connect(tmp_path / "store.sqlite3", isolation_level=None)
    other.execute("BEGIN EXCLUSIVE")  # another process holds the file
    decoder = WireDecoder()
    for i in range(5):
        w.submit(batch_of(100, start=i * 100, decoder=decoder), source_id=source_id, session_id=session_id, live=True)
    wait_for(lambda: w.status().state == HOLDING, what="holding state")
    status = w.status()
    assert "locked" in status.last_error and status.pending_rows == 500 and "holding" in status.text
    other.execute("COMMIT")
    other.close()
    wait_for(lambda: w.status().committed_events == 500, what="stored after the lock")
    assert w.status().state == OK
    times = [r[0] for r in read(tmp_path / "store.sqlite3", "SELECT raw_time FROM events ORDER BY rowid")]
    assert times == list(range(500))


def test_full_disk_holds_rows_then_recovers(writer, tmp_path):
    w = writer(retry_s=0.05)
    source_id, session_id = setup_session(w)
    pages = w.call(lambda c: c.execute("PRAGMA page_count").fetchone()[0], transaction=False)
    # SQLITE_FULL without filling the real disk: cap the file at its current size
    w.call(lambda c: c.execute(f"PRAGMA max_page_count = {pages}"), transaction=False)
    decoder = WireDecoder()
    for i in range(20):
        w.submit(batch_of(500, start=i * 500, decoder=decoder), source_id=source_id, session_id=session_id, live=False)
    wait_for(lambda: w.status().state == HOLDING, what="disk full noticed")
    assert "full" in w.status().last_error
    w.call(lambda c: c.execute("PRAGMA max_page_count = 1073741823"), transaction=False)
    wait_for(lambda: w.status().committed_events == 10_000, what="stored after space returned")
    assert read(tmp_path / "store.sqlite3", "SELECT count(*), count(DISTINCT raw_time) FROM events") == [(10_000, 10_000)]


def test_overflow_refuses_live_batches_loudly_and_records_the_loss(writer, tmp_path):
    w = writer(retry_s=0.05, busy_timeout_ms=50, max_pending_rows=300)
    serial_src, serial_session = setup_session(w, "serial", "/dev/rig")
    file_src, file_session = setup_session(w, "file", "/x/f.rsw")
    other = sqlite3.connect(tmp_path / "store.sqlite3", isolation_level=None)
    other.execute("BEGIN EXCLUSIVE")
    live, from_file = WireDecoder(), WireDecoder()
    for i in range(3):
        w.submit(batch_of(100, i * 100, live), source_id=serial_src, session_id=serial_session, live=True)
    wait_for(lambda: w.status().pending_rows == 300, what="bound reached")
    assert w.backlogged
    w.submit(batch_of(100, 300, live), source_id=serial_src, session_id=serial_session, live=True)
    w.submit(batch_of(100, 0, from_file), source_id=file_src, session_id=file_session, live=False)
    wait_for(lambda: w.status().state == OVERFLOW, what="overflow state")
    status = w.status()
    assert status.dropped_events == 100 and status.text.startswith("STORE OVERFLOW")
    other.execute("COMMIT")
    other.close()
    wait_for(lambda: w.status().committed_events == 400, what="recovery")
    path = tmp_path / "store.sqlite3"
    assert read(path, "SELECT count(*) FROM events WHERE session_id = ?", (file_session,)) == [(100,)]  # file: never dropped
    assert read(path, "SELECT count(*) FROM events WHERE session_id = ?", (serial_session,)) == [(300,)]
    loss = read(path, "SELECT source_id, reason FROM gaps")
    assert loss == [(serial_src, "store overflow: 100 live events not stored")]
    assert w.status().dropped_events == 100  # stays visible after recovery


def test_call_errors_reach_the_caller_and_roll_back(writer, tmp_path):
    w = writer()

    def half_then_fail(conn):
        db.register_source(conn, "file", "/half", None)
        raise RuntimeError("nope")

    with pytest.raises(RuntimeError, match="nope"):
        w.call(half_then_fail)
    assert w.call(lambda c: c.execute("SELECT count(*) FROM sources").fetchone()[0]) == 0


def test_stop_flushes_everything_pending(tmp_path):
    w = StoreWriter(tmp_path / "s.sqlite3", commit_interval_s=60.0)  # no timed commit before stop
    w.start()
    source_id, session_id = setup_session(w)
    w.submit(batch_of(250), source_id=source_id, session_id=session_id, live=False)
    assert w.stop() is True
    assert read(tmp_path / "s.sqlite3", "SELECT count(*) FROM events") == [(250,)]
    assert not Path(str(tmp_path / "s.sqlite3") + "-wal").exists() or \
        Path(str(tmp_path / "s.sqlite3") + "-wal").stat().st_size == 0  # checkpointed at close


def test_writer_refuses_a_newer_store_at_start(tmp_path):
    path = tmp_path / "s.sqlite3"
    db.open_store(path).close()
    conn = sqlite3.connect(path)
    conn.execute("PRAGMA user_version = 99")
    conn.close()
    with pytest.raises(db.StoreError):
        StoreWriter(path).start()


def test_a_writer_fault_is_loud_and_calls_fail_fast(writer):
    w = writer()
    source_id, session_id = setup_session(w)
    w.submit(Batch(["not a record"], time.time()), source_id=source_id, session_id=session_id, live=True)
    wait_for(lambda: w.status().state == "failed", what="failed state")
    assert w.status().text.startswith("STORE WRITER FAILED: TypeError")
    with pytest.raises(RuntimeError, match="not running"):
        w.call(lambda c: None)


def test_one_row_sqlite_cannot_take_is_kept_as_a_malformed_line_and_the_writer_goes_on(writer, tmp_path):
    w = writer()
    source_id, session_id = setup_session(w)
    good = batch_of(3)
    bad_event = good.records[0]._replace(t_us=1 << 63, line=99)  # past SQLite's 64-bit INTEGER (sqlite.org: datatype3)
    w.submit(Batch([*good.records, bad_event], time.time()), source_id=source_id, session_id=session_id, live=True)
    w.submit(batch_of(2, start=10), source_id=source_id, session_id=session_id, live=True)
    wait_for(lambda: w.status().committed_events == 5, what="the good rows")
    status = w.status()
    assert status.state == OK and status.diverted_events == 1 and status.unstored_rows == 0
    rows = read(tmp_path / "store.sqlite3", "SELECT line, reason, raw FROM raw_lines WHERE kind = 'malformed'")
    assert len(rows) == 1 and rows[0][0] == 99 and "could not be stored" in rows[0][1]
    assert rows[0][2].startswith(b"0 lever_down")


@pytest.mark.slow
def test_a_deleted_database_file_stops_the_writer_loudly(writer, tmp_path):
    w = writer()
    setup_session(w)
    for suffix in ("", "-wal", "-shm"):
        Path(f"{tmp_path / 'store.sqlite3'}{suffix}").unlink(missing_ok=True)
    wait_for(lambda: w.status().state == "failed", what="the writer to notice")
    assert "deleted" in w.status().last_error


def test_a_replaced_database_file_stops_the_writer_loudly(writer, tmp_path):
    w = writer()
    setup_session(w)
    other = tmp_path / "other.sqlite3"
    db.open_store(other).close()
    other.replace(tmp_path / "store.sqlite3")
    wait_for(lambda: w.status().state == "failed", what="the writer to notice")
    assert "replaced" in w.status().last_error
