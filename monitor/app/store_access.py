"""One write transaction of a command: open the store, wait for its lock, all or nothing.

Rule: the store is opened with a busy timeout of `wait_s` seconds (another
process, such as the window's writer or a recorder, may hold the write lock);
`work(conn)` runs inside `BEGIN IMMEDIATE` and is committed whole or rolled
back whole, whatever it raises. A store that cannot be opened, or a lock not
freed in time, is a `UsageError` naming `--db`, with nothing written.
`read_job` is the window's read: a worker job that opens the store read-only,
runs `fn(conn)` and closes it.
"""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path
from typing import TypeVar

from monitor.app.errors import UsageError
from monitor.app.paths import resolve_db
from monitor.store.connection import Busy, Connection

T = TypeVar("T")


def write_transaction(db: Path | None, wait_s: float, work: Callable[[Connection], T]) -> T:
    """`work(conn)` in one write transaction of the store at `db` (the default store when None)."""
    from monitor.store.db import StoreError, open_store

    path = resolve_db(db)
    try:
        conn = open_store(path, busy_timeout_ms=int(max(wait_s, 0) * 1000))
    except StoreError as exc:
        raise UsageError(f"--db: {exc}") from None
    try:
        conn.execute("BEGIN IMMEDIATE")
        try:
            result = work(conn)
            conn.execute("COMMIT")
            return result
        except BaseException:
            if conn.in_transaction:
                conn.execute("ROLLBACK")
            raise
    except Busy as exc:
        raise UsageError(f"--db: {path}: {exc} (waited {wait_s:g} s); nothing recorded") from None
    finally:
        conn.close()


def read_job(path: Path, fn: Callable[[Connection], T]) -> Callable[[object], T]:
    """A worker job (it takes the job handle) that runs `fn` on a read-only connection to the store at `path`."""
    from monitor.store.db import open_store

    def work(job: object) -> T:
        conn = open_store(path, readonly=True)
        try:
            return fn(conn)
        finally:
            conn.close()
    return work
