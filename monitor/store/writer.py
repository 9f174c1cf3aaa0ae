"""The store's single writer: one thread, one connection, batched durable commits.

Rule: producers call `submit()`, which never blocks and never touches the
disk; the writer thread turns batches into rows (monitor.store.rows, as an import
does) and commits everything pending at most `commit_interval_s` after it arrived, in one `BEGIN IMMEDIATE`
transaction that also holds each file source's newest resume position (exactly
once after any crash). While rows wait for that commit the writer takes new
batches every `GATHER_S`, not as each one arrives, so that it does not wake
(and take the GIL) once per reader batch; a `call()` waits at most that much
longer. If a commit fails (database locked by another process, disk full, I/O
error) the rows stay in memory and the commit is retried every `retry_s`; the
state turns "holding" (a warning). Past `max_pending_rows` rows in memory,
batches from live (serial) sources are refused and counted: the state turns
"overflow" (loud), and once the store recovers a gap row records how many
events were lost and when. File sources are never refused (the file keeps
them): `backlogged` tells their readers to pause. Anything else (schema,
session rows, queries) runs on the writer's connection through `call()`, in
order with the batches. Codes of unknown event words are settled inside each
commit against the file, since another process (an import) may have added
words meanwhile. A row SQLite cannot take (an integer past 64 bits, say) never
stops the writer: that commit is redone row by row, an event row that fails is
kept as a malformed line ("could not be stored") and any row that still fails
is counted in `unstored_rows`. The writer holds its sources' locks
(monitor.store.source_locks), refreshes them, and releases them when it stops.
Before every commit, and every `IDENTITY_S` besides, it checks that the
database file is still the one it opened; a deleted or replaced file ends it
(state "failed", `file_lost`), since what it wrote would go nowhere anyone
can read.
"""

from __future__ import annotations

import json
import os
import queue
import sqlite3
import threading
import time
from concurrent.futures import Future
from pathlib import Path
from typing import Any, Callable, NamedTuple, TypeVar

from drivers.status import Batch, FilePosition
from drivers.wire import Event
from monitor.store import source_locks
from monitor.store.db import SYNCHRONOUS, open_store
from monitor.store.rows import Codes, event_sql, raw_sql, recode, session_rows

T = TypeVar("T")

OK, HOLDING, OVERFLOW, FAILED, CLOSED = "ok", "holding", "overflow", "failed", "closed"

COMMIT_INTERVAL_S = 0.1
RETRY_S = 0.5
GATHER_S = 0.02  # while rows wait for their commit, the writer takes new batches at most this often
CHECKPOINT_S = 30.0
MAX_PENDING_ROWS = 500_000
WRITER_BUSY_MS = 250  # the writer's own wait for a lock: short, it retries while still draining
CALL_BUSY_S = 5.0  # how long a call() keeps trying while another process holds the lock
IDENTITY_S = 1.0  # how often the writer checks that its database file is still there and the same
# errors that mean "this row", not "the database": the commit is redone row by row
_ROW_ERRORS = (OverflowError, ValueError, TypeError, sqlite3.IntegrityError, sqlite3.InterfaceError,
               sqlite3.ProgrammingError, sqlite3.DataError)

_STOP = object()


class WriterStatus(NamedTuple):
    state: str
    pending_rows: int  # rows in memory, not yet committed
    committed_events: int
    dropped_events: int  # live events refused while over the memory bound
    commits: int
    last_error: str | None
    last_commit_at: float | None
    diverted_events: int = 0  # events SQLite could not take, kept as malformed lines instead
    unstored_rows: int = 0  # rows that could not be stored at all
    file_lost: bool = False  # the database file was deleted or replaced: what was committed went with it

    @property
    def text(self) -> str:
        if self.state == HOLDING:
            return f"store not writable, holding {self.pending_rows} rows in memory: {self.last_error}"
        if self.state == OVERFLOW:
            return f"STORE OVERFLOW: {self.dropped_events} events not stored ({self.last_error})"
        if self.state == FAILED:
            return f"STORE WRITER FAILED: {self.last_error}"
        return self.state


_GAPS_SQL = "INSERT INTO gaps (source_id, session_id, start_at, end_at, reason) VALUES (?, ?, ?, ?, ?)"
_SAMPLES_SQL = "INSERT INTO clock_samples (session_id, segment, t_us, received_at) VALUES (?, ?, ?, ?)"


def _insert_all(sql: str, rows: list[tuple], conn: sqlite3.Connection) -> list[tuple[tuple, str]]:
    conn.executemany(sql, rows)
    return []


def _as_raw_line(event_row: tuple, names: dict[int, str], why: str) -> tuple:
    """An event row SQLite refused, as a malformed raw line that keeps what it said."""
    _segment, line, t_us, raw_time, code, value, _wall = event_row
    text = f"{raw_time} {names.get(code, code)}" + (f" {value}" if value else "")
    return (line if isinstance(line, int) and abs(line) < 1 << 63 else None, None, "malformed",
            f"could not be stored ({why}); device time {t_us}", text.encode("ascii", "replace"))


def _is_busy(exc: sqlite3.OperationalError) -> bool:
    text = str(exc)
    return "locked" in text or "busy" in text


class _Call(NamedTuple):
    fn: Callable[[sqlite3.Connection], Any]
    future: Future
    transaction: bool


class _Loss:
    """Live events refused for one (source, session) while over the bound."""

    def __init__(self, start: float) -> None:
        self.start = self.end = start
        self.events = 0


class StoreWriter:
    """Owns the one writing connection to the store file."""

    def __init__(
        self,
        path: str | Path,
        *,
        commit_interval_s: float = COMMIT_INTERVAL_S,
        retry_s: float = RETRY_S,
        checkpoint_s: float = CHECKPOINT_S,
        max_pending_rows: int = MAX_PENDING_ROWS,
        busy_timeout_ms: int = WRITER_BUSY_MS,
        synchronous: str = SYNCHRONOUS,
    ) -> None:
        self.path = Path(path)
        self.commit_interval_s = commit_interval_s
        self.retry_s = retry_s
        self.checkpoint_s = checkpoint_s
        self.max_pending_rows = max_pending_rows
        self._busy_ms = busy_timeout_ms
        self._synchronous = synchronous
        self._queue: queue.SimpleQueue = queue.SimpleQueue()
        self._lock = threading.Lock()
        self._thread: threading.Thread | None = None
        self._ready = threading.Event()
        self._open_error: BaseException | None = None
        self._stop_deadline = 0.0
        # rows waiting for a commit (writer thread only, counters read under _lock): per session, its
        # event rows and raw-line rows (monitor.store.rows: no session id in them)
        self._rows: dict[int, tuple[list[tuple], list[tuple]]] = {}
        self._row_count = 0
        self._gaps: list[tuple] = []
        self._samples: list[tuple] = []
        self._offsets: dict[int, FilePosition] = {}
        self._losses: dict[tuple[int, int], _Loss] = {}
        self._codes = Codes({})
        self._first_pending: float | None = None
        self._state = OK
        self._pending = 0
        self._committed = self._dropped = self._commits = 0
        self._last_error: str | None = None
        self._last_commit: float | None = None
        self._diverted = self._unstored = 0
        self._file_lost = False
        self._held_locks: list[str] = []  # source lock keys held (writer thread only)
        self._identity: tuple[int, int] | None = None

    # --- any thread ---------------------------------------------------------

    def start(self) -> None:
        """Open the store in the writer thread; raises StoreError (or OSError) if it cannot."""
        self._thread = threading.Thread(target=self._run, name="store writer", daemon=True)
        self._thread.start()
        self._ready.wait()
        if self._open_error is not None:
            raise self._open_error

    def submit(self, batch: Batch, *, source_id: int, session_id: int, live: bool) -> None:
        """Queue a batch for storage; never blocks."""
        self._queue.put((batch, source_id, session_id, live))

    def call(self, fn: Callable[[sqlite3.Connection], T], *, transaction: bool = True,
             timeout: float | None = 30.0) -> T:
        """Run `fn(conn)` on the writer's connection after everything submitted so far."""
        if self._thread is None or not self._thread.is_alive() or self.status().state == FAILED:
            raise RuntimeError(f"the store writer is not running ({self.status().text})")
        future: Future = Future()
        self._queue.put(_Call(fn, future, transaction))
        return future.result(timeout)

    def stop(self, timeout: float = 10.0) -> bool:
        """Commit what is pending (retrying up to `timeout`) and close; False if rows remain."""
        if self._thread is None:
            return True
        self._stop_deadline = time.monotonic() + timeout
        self._queue.put(_STOP)
        self._thread.join(timeout + 5.0)
        return self.status().pending_rows == 0

    @property
    def backlogged(self) -> bool:
        """True while rows in memory exceed the bound: file readers should pause."""
        return self._pending >= self.max_pending_rows

    def status(self) -> WriterStatus:
        with self._lock:
            return WriterStatus(self._state, self._pending, self._committed, self._dropped, self._commits,
                                self._last_error, self._last_commit, self._diverted, self._unstored,
                                self._file_lost)

    def hold_source(self, key: str, holder: str) -> str | None:
        """Take the lock on source `key` for this process (see source_locks.acquire); held until stop."""
        def take(conn: sqlite3.Connection) -> str | None:
            notice = source_locks.acquire(conn, key, holder)
            self._held_locks.append(key)
            return notice

        return self.call(take)

    # --- writer thread ----------------------------------------------------------

    def _run(self) -> None:
        try:
            conn = open_store(self.path, busy_timeout_ms=self._busy_ms, synchronous=self._synchronous)
            st = os.stat(self.path)
            self._identity = (st.st_dev, st.st_ino)
            self._codes = Codes(dict(conn.execute("SELECT name, code FROM event_codes")))
        except BaseException as exc:  # noqa: BLE001 - handed to start()'s caller
            self._open_error = exc
            self._ready.set()
            return
        self._ready.set()
        try:
            self._serve(conn)
        except BaseException as exc:  # noqa: BLE001 - shown loudly in status, never silent
            self._set(FAILED, f"{type(exc).__name__}: {exc}")
        finally:
            conn.close()

    def _serve(self, conn: sqlite3.Connection) -> None:
        next_try = 0.0
        next_checkpoint = time.monotonic() + self.checkpoint_s
        next_identity = next_beat = time.monotonic()
        while True:
            now = time.monotonic()
            due = min(next_checkpoint, next_identity, next_beat if self._held_locks else next_checkpoint)
            if self._first_pending is not None:
                due = min(due, max(self._first_pending + self.commit_interval_s, next_try))
                # rows wait for a commit: let batches gather for a while instead of waking for each one
                # (16 readers hand over ~1,600 batches a second; each wake-up takes the GIL from the GUI)
                time.sleep(max(0.0, min(due - now, GATHER_S)))
                due = now = time.monotonic()
            try:
                item = self._queue.get(timeout=due - now) if due > now else self._queue.get_nowait()
            except queue.Empty:
                item = None
            stopping = False
            while item is not None:
                if item is _STOP:
                    stopping = True
                elif isinstance(item, _Call):
                    self._commit_if_possible(conn)
                    self._run_call(conn, item)
                else:
                    self._take(*item)
                try:
                    item = self._queue.get_nowait()
                except queue.Empty:
                    item = None
            now = time.monotonic()
            if stopping:
                self._drain_for_stop(conn)
                return
            if self._first_pending is not None and now >= max(self._first_pending + self.commit_interval_s, next_try):
                if not self._commit_if_possible(conn):
                    next_try = now + self.retry_s
            if now >= next_checkpoint:
                self._checkpoint(conn, "PASSIVE")
                next_checkpoint = now + self.checkpoint_s
            if now >= next_identity:
                self._check_identity()
                next_identity = now + IDENTITY_S
            if self._held_locks and now >= next_beat:
                self._locks(conn, source_locks.heartbeat)
                next_beat = now + source_locks.HEARTBEAT_S

    def _check_identity(self) -> None:
        """The database file must still be the one opened; else stop (raises, the state turns failed)."""
        try:
            st = os.stat(self.path)
            problem = "" if (st.st_dev, st.st_ino) == self._identity else "replaced by another file"
        except FileNotFoundError:
            problem = "deleted"
        if problem:
            with self._lock:
                self._file_lost = True
            raise RuntimeError(f"the database file {self.path} was {problem} while recording")

    def _locks(self, conn: sqlite3.Connection, step: Callable[[sqlite3.Connection, list[str]], None]) -> None:
        """Heartbeat or release the held source locks in a short transaction; a busy store is tried later."""
        try:
            conn.execute("BEGIN IMMEDIATE")
            step(conn, self._held_locks)
            conn.execute("COMMIT")
        except sqlite3.Error as exc:
            if conn.in_transaction:
                conn.execute("ROLLBACK")
            self._set_error(f"source lock: {exc}")

    def _drain_for_stop(self, conn: sqlite3.Connection) -> None:
        deadline = self._stop_deadline
        while not self._commit_if_possible(conn) and time.monotonic() < deadline:
            time.sleep(min(self.retry_s, max(0.0, deadline - time.monotonic())))
        if self._held_locks:
            self._locks(conn, source_locks.release)
        self._checkpoint(conn, "TRUNCATE")
        with self._lock:
            if self._state == OK:
                self._state = CLOSED

    def _run_call(self, conn: sqlite3.Connection, call: _Call) -> None:
        """Run a call; while another process holds the lock, try again for up to CALL_BUSY_S."""
        if not call.future.set_running_or_notify_cancel():
            return
        deadline = time.monotonic() + CALL_BUSY_S
        while True:
            try:
                result = self._call_once(conn, call)
            except sqlite3.OperationalError as exc:
                if _is_busy(exc) and time.monotonic() < deadline:
                    time.sleep(0.05)
                    continue
                call.future.set_exception(exc)
            except BaseException as exc:  # noqa: BLE001 - handed to the caller
                call.future.set_exception(exc)
            else:
                call.future.set_result(result)
            return

    @staticmethod
    def _call_once(conn: sqlite3.Connection, call: _Call) -> Any:
        if call.transaction:
            conn.execute("BEGIN IMMEDIATE")
        try:
            result = call.fn(conn)
            if call.transaction:
                conn.execute("COMMIT")
        except BaseException:
            if conn.in_transaction:
                conn.execute("ROLLBACK")
            raise
        return result

    def _take(self, batch: Batch, source_id: int, session_id: int, live: bool) -> None:
        """Turn one batch into pending rows (or count it as lost when live and over the bound)."""
        for gap in batch.gaps:
            self._gaps.append((source_id, session_id, gap.start, gap.end, gap.reason))
        if batch.notices:
            self._session(session_id)[1].extend((None, None, "notice", text, None) for text in batch.notices)
            self._row_count += len(batch.notices)
        if live and self._pending >= self.max_pending_rows and batch.records:
            self._lose(batch, source_id, session_id)
        else:
            if batch.records:
                events, raw = session_rows(batch.records, self._codes)
                pending_events, pending_raw = self._session(session_id)
                pending_events.extend(events)
                pending_raw.extend(raw)
                self._row_count += len(events) + len(raw)
            if batch.resume is not None:
                self._offsets[source_id] = batch.resume
            if live and batch.records:
                last = batch.records[-1]
                for record in reversed(batch.records):
                    if type(record) is Event:
                        last = record
                        break
                if type(last) is Event:
                    self._samples.append((session_id, last.segment, last.t_us, batch.received))
        pending = self._row_count
        with self._lock:
            self._pending = pending
        if self._first_pending is None and (pending or self._gaps or self._offsets or self._samples):
            self._first_pending = time.monotonic()

    def _session(self, session_id: int) -> tuple[list[tuple], list[tuple]]:
        """The session's pending (event rows, raw-line rows)."""
        rows = self._rows.get(session_id)
        if rows is None:
            rows = self._rows[session_id] = ([], [])
        return rows

    def _lose(self, batch: Batch, source_id: int, session_id: int) -> None:
        lost = sum(1 for r in batch.records if type(r) is Event) or len(batch.records)
        loss = self._losses.get((source_id, session_id))
        if loss is None:
            loss = self._losses[(source_id, session_id)] = _Loss(batch.received)
        loss.end = batch.received
        loss.events += lost
        with self._lock:
            self._dropped += lost
        self._set(OVERFLOW, f"more than {self.max_pending_rows} rows waiting in memory; "
                            f"live events refused: {self._dropped}")

    def _commit_if_possible(self, conn: sqlite3.Connection) -> bool:
        if self._first_pending is None and not self._losses:
            return True
        try:
            try:
                self._commit(conn)
            except _ROW_ERRORS:
                if conn.in_transaction:
                    conn.execute("ROLLBACK")
                self._commit(conn, row_by_row=True)
        except sqlite3.Error as exc:
            if conn.in_transaction:
                try:
                    conn.execute("ROLLBACK")
                except sqlite3.Error:
                    pass
            with self._lock:
                overflow = self._state == OVERFLOW
            self._set(OVERFLOW if overflow else HOLDING, f"{type(exc).__name__}: {exc}")
            return False
        return True

    @staticmethod
    def _insert_each(sql: str, rows: list[tuple], conn: sqlite3.Connection) -> list[tuple[tuple, str]]:
        """Insert rows one at a time; return the rows that failed, each with why."""
        failed = []
        for row in rows:
            try:
                conn.execute(sql, row)
            except _ROW_ERRORS as exc:
                failed.append((row, f"{type(exc).__name__}: {exc}"))
        return failed

    def _commit(self, conn: sqlite3.Connection, row_by_row: bool = False) -> None:
        self._check_identity()  # never commit into a file that is gone: a stat costs microseconds
        gaps = list(self._gaps)
        for (source_id, session_id), loss in self._losses.items():
            gaps.append((source_id, session_id, loss.start, loss.end,
                         f"store overflow: {loss.events} live events not stored"))
        conn.execute("BEGIN IMMEDIATE")
        # inside the commit: another process (an import) may have added unknown words since we looked
        remap = self._codes.settle(conn)
        if remap:
            for session_id, (events, raw) in self._rows.items():
                self._rows[session_id] = (recode(events, remap), raw)
        insert = self._insert_each if row_by_row else _insert_all
        committed = diverted = unstored = 0
        for session_id, (events, raw) in self._rows.items():
            failed = insert(event_sql(session_id), events, conn) if events else []
            if failed:
                names = {code: name for name, code in self._codes.known.items()}
                raw = raw + [_as_raw_line(row, names, why) for row, why in failed]
            if raw:
                unstored += len(insert(raw_sql(session_id), raw, conn))
            committed += len(events) - len(failed)
            diverted += len(failed)
        if gaps:
            unstored += len(insert(_GAPS_SQL, gaps, conn))
        if self._samples:  # derived from the events (clock alignment): one SQLite refuses is just left out
            insert(_SAMPLES_SQL, self._samples, conn)
        now = time.time()
        for source_id, pos in self._offsets.items():
            conn.execute(
                "INSERT INTO file_offsets (source_id, byte_offset, st_dev, st_ino, fingerprint, prefix_len, "
                "decoder, updated_at) VALUES (?, ?, ?, ?, ?, ?, ?, ?) ON CONFLICT (source_id) DO UPDATE SET "
                "byte_offset = excluded.byte_offset, st_dev = excluded.st_dev, st_ino = excluded.st_ino, "
                "fingerprint = excluded.fingerprint, prefix_len = excluded.prefix_len, "
                "decoder = excluded.decoder, updated_at = excluded.updated_at",
                (source_id, pos.offset, pos.identity[0], pos.identity[1], pos.fingerprint, pos.prefix_len,
                 json.dumps(pos.decoder), now))
        conn.execute("COMMIT")
        self._codes.new.clear()
        for rows in (self._gaps, self._samples):
            rows.clear()
        self._rows.clear()
        self._row_count = 0
        self._offsets.clear()
        self._losses.clear()
        self._first_pending = None
        with self._lock:
            self._committed += committed
            self._diverted += diverted
            self._unstored += unstored
            self._commits += 1
            self._pending = 0
            self._last_commit = now
            self._state = OK
            self._last_error = None if self._dropped == 0 else self._last_error

    def _checkpoint(self, conn: sqlite3.Connection, mode: str) -> None:
        try:
            conn.execute(f"PRAGMA wal_checkpoint({mode})")
        except sqlite3.Error as exc:
            self._set_error(f"checkpoint: {exc}")

    def _set(self, state: str, error: str) -> None:
        with self._lock:
            self._state, self._last_error = state, error

    def _set_error(self, error: str) -> None:
        with self._lock:
            self._last_error = error
