"""Opening the store's SQLite file safely, and the few version-1 queries the recorder needs.

Rule: `open_store` checks a file before it changes it: another program's
database, a damaged file (SQLite's `quick_check`, for every opening that may
write: about 0.3 s per 50 MB), a file with tables but no rigside version, one
written by a newer rigside, a folder that cannot be created, or a read-only
file or folder is refused with a one-line `StoreError` naming the file and
what to do, and left byte-for-byte as it was. Only then are WAL, the
synchronous level and the migrations applied. Connections are in autocommit mode
(`isolation_level=None`): writers say `BEGIN IMMEDIATE` themselves, readers
never hold a snapshot open, so checkpoints can complete. Other processes
(record, import, decide) wait for the write lock up to `busy_timeout_ms`;
processes creating a new file together all open it (the checks read one
snapshot, the switch to WAL is retried).
"""

from __future__ import annotations

import json
import os
import sqlite3
import time
from pathlib import Path
from urllib.parse import quote

from drivers.status import FilePosition
from monitor.store.schema import APPLICATION_ID, MIGRATIONS, Migration, apply_migrations

BUSY_TIMEOUT_MS = 5000
# FULL: every commit is synced, so a power cut loses nothing committed. At one
# commit per <= 100 ms it costs little (measured figures in docs/store.md).
SYNCHRONOUS = "FULL"


class StoreError(Exception):
    """The database cannot be used as it is; the message names the file and why."""


def open_store(
    path: str | Path,
    *,
    readonly: bool = False,
    busy_timeout_ms: int = BUSY_TIMEOUT_MS,
    synchronous: str = SYNCHRONOUS,
    migrations: tuple[Migration, ...] = MIGRATIONS,
    check: bool | None = None,
) -> sqlite3.Connection:
    """A connection to a checked, current-version store (created if absent, unless readonly).

    `check`: run quick_check first (default: when the connection may write).
    """
    path = Path(path)
    if readonly and not path.is_file():
        raise StoreError(f"{path}: no such database")
    if not readonly:
        _writable(path)
    target = f"file:{quote(str(path.resolve()))}?mode=ro" if readonly else str(path)
    try:
        conn = sqlite3.connect(target, uri=readonly, isolation_level=None, check_same_thread=False,
                               timeout=busy_timeout_ms / 1000)
    except sqlite3.Error as exc:
        raise StoreError(f"{path}: cannot open the database ({exc})") from None
    try:
        version = _check(conn, path, len(migrations))
        if (not readonly) if check is None else check:
            _intact(conn, path)
        conn.execute(f"PRAGMA busy_timeout = {int(busy_timeout_ms)}")
        if readonly:
            if version < len(migrations):
                raise StoreError(f"{path}: schema version {version} is older than this rigside's "
                                 f"{len(migrations)}; a recording command upgrades it")
        else:
            _use_wal(conn, busy_timeout_ms)
            conn.execute(f"PRAGMA synchronous = {synchronous}")
            apply_migrations(conn, migrations)
        conn.execute("PRAGMA foreign_keys = ON")
    except sqlite3.Error as exc:
        conn.close()
        raise StoreError(f"{path}: cannot use the database ({exc}); the file was left unchanged") from None
    except BaseException:
        conn.close()
        raise
    return conn


def _writable(path: Path) -> None:
    """The folder exists (made if needed) and the file and folder can be written (WAL needs both)."""
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise StoreError(f"{path}: cannot create the folder {path.parent} ({exc.strerror or exc})") from None
    if path.exists() and path.is_dir():
        raise StoreError(f"{path}: is a folder, not a database file")
    if path.exists() and not os.access(path, os.R_OK):
        raise StoreError(f"{path}: cannot read the database (no permission)")
    if path.exists() and not os.access(path, os.W_OK):
        raise StoreError(f"{path}: the database file is read-only; recording commands need to write it")
    if not os.access(path.parent, os.W_OK):
        raise StoreError(f"{path}: the folder {path.parent} is read-only; the database needs a folder it can "
                         "write (its journal lives beside it)")


def _use_wal(conn: sqlite3.Connection, busy_timeout_ms: int) -> None:
    """Switch the file to WAL, retrying while another process holds it.

    SQLite answers a journal-mode change "database is locked" at once, without
    its busy handler, while another connection reads the file: two processes
    creating a new store together met that in up to one opening in six here.
    """
    deadline = time.monotonic() + busy_timeout_ms / 1000
    while True:
        try:
            conn.execute("PRAGMA journal_mode = WAL")
            return
        except sqlite3.OperationalError as exc:
            if "locked" not in str(exc) or time.monotonic() > deadline:
                raise
            time.sleep(0.005)


def _intact(conn: sqlite3.Connection, path: Path) -> None:
    """SQLite's quick_check: a damaged page or index refuses the file (a backup restores it)."""
    try:
        problems = [row[0] for row in conn.execute("PRAGMA quick_check(3)")]
    except sqlite3.DatabaseError as exc:
        problems = [str(exc)]
    if problems != ["ok"]:
        found = " ".join("; ".join(problems).split())[:200]
        raise StoreError(f"{path}: the database is damaged ({found}); nothing was written. "
                         "Restore it from a backup (docs/store.md, \"Backups\")")


def _check(conn: sqlite3.Connection, path: Path, newest: int) -> int:
    """The file's schema version, or a StoreError saying why it is not ours to change."""
    try:
        conn.execute("BEGIN")  # one snapshot: another process may be creating the file meanwhile
        try:
            app_id = conn.execute("PRAGMA application_id").fetchone()[0]
            version = conn.execute("PRAGMA user_version").fetchone()[0]
            tables = conn.execute("SELECT count(*) FROM sqlite_master").fetchone()[0]
        finally:
            conn.execute("COMMIT")
    except sqlite3.DatabaseError as exc:
        raise StoreError(f"{path}: not a rigside database, or damaged ({exc}); the file was left unchanged") from None
    if app_id not in (0, APPLICATION_ID) or (app_id == 0 and tables):
        raise StoreError(f"{path}: belongs to another program (not a rigside database); the file was left unchanged")
    if version > newest:
        raise StoreError(f"{path}: written by a newer rigside (schema version {version}; this one knows up to "
                         f"{newest}); upgrade rigside. The file was left unchanged")
    return version


# --- version-1 queries (run on the writer's connection, see StoreWriter.call) ---------


def register_source(conn: sqlite3.Connection, kind: str, path: str, rig: str | None = None,
                    usb_serial: str | None = None, mapping_path: str | None = None) -> int:
    """The id of source (kind, path), created on first use; rig and USB serial kept current."""
    row = conn.execute("SELECT id FROM sources WHERE kind = ? AND path = ?", (kind, path)).fetchone()
    if row:
        conn.execute("UPDATE sources SET rig = coalesce(?, rig), usb_serial = coalesce(?, usb_serial), "
                     "mapping_path = ? WHERE id = ?", (rig, usb_serial, mapping_path, row[0]))
        return row[0]
    cur = conn.execute("INSERT INTO sources (kind, path, rig, usb_serial, mapping_path, created_at) "
                       "VALUES (?, ?, ?, ?, ?, ?)", (kind, path, rig, usb_serial, mapping_path, time.time()))
    return int(cur.lastrowid)


def file_position(conn: sqlite3.Connection, source_id: int) -> FilePosition | None:
    """Where a file source resumes, or None for a file never read."""
    row = conn.execute("SELECT byte_offset, st_dev, st_ino, fingerprint, prefix_len, decoder "
                       "FROM file_offsets WHERE source_id = ?", (source_id,)).fetchone()
    if row is None:
        return None
    offset, dev, ino, print_, prefix_len, decoder = row
    return FilePosition(offset, (dev, ino), print_, prefix_len, json.loads(decoder))


def start_session(conn: sqlite3.Connection, source_id: int | None, animal: str, rig: str,
                  protocol_name: str | None, protocol_version: int | None, protocol_text: str | None) -> int:
    now = time.time()
    start_wall = time.strftime("%Y-%m-%dT%H:%M:%S%z", time.localtime(now))
    start_wall = start_wall[:-2] + ":" + start_wall[-2:]
    cur = conn.execute(
        "INSERT INTO sessions (source_id, animal, rig, protocol_name, protocol_version, protocol_text, "
        "started_at, start_wall) VALUES (?, ?, ?, ?, ?, ?, ?, ?)",
        (source_id, animal, rig, protocol_name, protocol_version, protocol_text, now, start_wall))
    return int(cur.lastrowid)


def end_session(conn: sqlite3.Connection, session_id: int, ended_at: float | None = None) -> None:
    conn.execute("UPDATE sessions SET ended_at = ? WHERE id = ?", (ended_at or time.time(), session_id))
