"""Pushing a rig PC's local store to the lab database, exactly once, resumable at any point.

Rule: the lab keeps, per PC, a bookmark for every table synced by rowid
(events, decision and care entries, raw lines, clock samples, fits,
assignment plans: rows only ever added), and each chunk of rows is committed
in the same server transaction as its bookmark, so a kill -9 or a dropped
connection loses or repeats nothing: the next sync starts from the lab's
bookmark. Every other local table (sessions, animals, rigs, protocols,
trial builds, ...; tables added later are found by themselves) is compared
row by row through a digest of its canonical JSON, and changed rows are sent
again; a session's trials are replaced whenever its trial build changes. A
row's lab identity is (PC number, local rowid). Before anything is pushed,
every local animal is placed in the lab's animal registry: the same name on
two PCs is one animal only when both carry the same lab id; without lab ids
telling them apart the sync is refused (`SyncRefused`) naming both PCs. The
PC's identity (a UUID made at its first sync) and the last sync's state live
in the local tables `lab_sync` and `lab_bookmarks`. One sync per PC at a time
(a server-side advisory lock, keyed by the lab's schema and the PC). Nothing here runs on the live path.
"""

from __future__ import annotations

import base64
import hashlib
import json
import math
import socket
import sqlite3
import time
import uuid
from dataclasses import dataclass, field
from typing import Any, Callable, Iterable

from monitor.store.derive import TRIAL_COLUMNS
from monitor.store.lab_schema import (IN_THIS_LAB, LOCK_REGISTRY, LOCK_SYNC, LabBusy, LabError, LabUnreachable, connect,
                                      lab_driver, require_current, shown)

BULK = "events"                       # its own typed table on the server
DERIVED = "trials"                    # replaced per session with its trial build
APPEND_ONLY = ("decisions", "care_log", "raw_lines", "clock_samples", "fits", "assignment_plans")
LOCAL_ONLY = ("file_offsets", "lab_sync", "lab_bookmarks", "sqlite_sequence", "sqlite_stat1")
CHUNK_ROWS = 50_000
_EVENT_COLUMNS = ("session_id", "segment", "line", "t_us", "raw_time", "code", "value", "wall")


class SyncRefused(LabError):
    """The lab cannot take this PC's data as it is (e.g. an animal name that is ambiguous lab-wide)."""


@dataclass
class SyncResult:
    """What one sync did: rows sent per table, and how long it took."""

    pc_name: str
    pc_number: int
    sent: dict[str, int] = field(default_factory=dict)
    seconds: float = 0.0

    @property
    def total(self) -> int:
        return sum(self.sent.values())


# --- canonical rows ---------------------------------------------------------------------------


def encode_value(value: Any) -> Any:
    """A SQLite value as JSON: BLOBs as {"base64": ...}, non-finite floats as {"float": "inf"}."""
    if isinstance(value, bytes):
        return {"base64": base64.b64encode(value).decode("ascii")}
    if isinstance(value, float) and not math.isfinite(value):
        return {"float": repr(value)}
    return value


def decode_value(value: Any) -> Any:
    """The inverse of `encode_value`."""
    if isinstance(value, dict):
        if "base64" in value:
            return base64.b64decode(value["base64"])
        return float(value["float"])
    return value


def _canonical(columns: tuple[str, ...], row: Iterable[Any]) -> tuple[str, str]:
    text = json.dumps(dict(zip(columns, map(encode_value, row))), separators=(",", ":"), ensure_ascii=False)
    return text, hashlib.blake2b(text.encode("utf-8"), digest_size=16).hexdigest()


# --- local side -------------------------------------------------------------------------------


def _state(conn: sqlite3.Connection) -> dict[str, str]:
    return dict(conn.execute("SELECT key, value FROM lab_sync"))


def _write_state(conn: sqlite3.Connection, values: dict[str, str | None],
                 bookmarks: dict[str, int] | None = None) -> None:
    conn.execute("BEGIN IMMEDIATE")
    try:
        for key, value in values.items():
            if value is None:
                conn.execute("DELETE FROM lab_sync WHERE key = ?", (key,))
            else:
                conn.execute("INSERT INTO lab_sync (key, value) VALUES (?, ?) ON CONFLICT (key) DO UPDATE "
                             "SET value = excluded.value", (key, value))
        for tbl, rowid in (bookmarks or {}).items():
            conn.execute("INSERT INTO lab_bookmarks (tbl, last_rowid) VALUES (?, ?) ON CONFLICT (tbl) DO UPDATE "
                         "SET last_rowid = excluded.last_rowid", (tbl, rowid))
        conn.execute("COMMIT")
    except BaseException:
        conn.execute("ROLLBACK")
        raise


def pc_identity(conn: sqlite3.Connection, name: str | None = None) -> tuple[str, str]:
    """(uuid, name) of this PC in the lab, made on first use; a given name replaces the stored one."""
    state = _state(conn)
    ident = state.get("pc_uuid") or str(uuid.uuid4())
    pc_name = name or state.get("pc_name") or socket.gethostname()
    if state.get("pc_uuid") != ident or state.get("pc_name") != pc_name:
        _write_state(conn, {"pc_uuid": ident, "pc_name": pc_name})
    return ident, pc_name


def sync_status(conn: sqlite3.Connection) -> dict[str, Any]:
    """The last sync's state and the rows waiting (rows added since the lab's last known bookmarks)."""
    state = _state(conn)
    marks = dict(conn.execute("SELECT tbl, last_rowid FROM lab_bookmarks"))
    tables = {r[0] for r in conn.execute("SELECT name FROM sqlite_master WHERE type = 'table'")}
    waiting = sum(conn.execute(f'SELECT count(*) FROM "{t}" WHERE rowid > ?', (marks.get(t, 0),)).fetchone()[0]
                  for t in (BULK, *APPEND_ONLY) if t in tables)
    return {"pc_name": state.get("pc_name"), "last_sync_at": state.get("last_sync_at"),
            "unreachable_since": state.get("unreachable_since"), "last_error": state.get("last_error"),
            "rows_waiting": waiting}


def _tables(conn: sqlite3.Connection) -> dict[str, tuple[str, ...] | None]:
    """Synced tables -> their primary-key columns when WITHOUT ROWID, else None (keyed by rowid)."""
    out: dict[str, tuple[str, ...] | None] = {}
    for name, sql in conn.execute("SELECT name, sql FROM sqlite_master WHERE type = 'table' ORDER BY name"):
        if name in LOCAL_ONLY or name in (BULK, DERIVED) or name.startswith("sqlite_"):
            continue
        if "WITHOUT ROWID" in (sql or "").upper():
            out[name] = tuple(r[1] for r in sorted(conn.execute(f'PRAGMA table_info("{name}")'), key=lambda r: r[5])
                              if r[5] > 0)
        else:
            out[name] = None
    return out


def _local_animals(conn: sqlite3.Connection) -> dict[str, str | None]:
    """Every animal name in the store -> its lab id (the animal record's `lab_id`, when the store has one)."""
    has_lab_id = any(r[1] == "lab_id" for r in conn.execute("PRAGMA table_info(animals)"))
    names: dict[str, str | None] = {r[0]: None for r in conn.execute("SELECT DISTINCT animal FROM sessions")}
    lab_id = "nullif(trim(lab_id), '')" if has_lab_id else "NULL"
    for name, ident in conn.execute(f"SELECT name, {lab_id} FROM animals"):
        names[name] = ident
    return names


# --- the server side --------------------------------------------------------------------------


def _register_pc(pg, ident: str, name: str) -> int:
    row = pg.execute("INSERT INTO pcs (uuid, name) VALUES (%s, %s) ON CONFLICT (uuid) DO UPDATE SET name = "
                     "EXCLUDED.name RETURNING id", (ident, name)).fetchone()
    pg.commit()
    return int(row[0])


def _place_animals(pg, pc: int, pc_name: str, animals: dict[str, str | None]) -> None:
    """Map each local animal to a lab animal (see the module rule); SyncRefused names every conflict."""
    pg.execute(f"SELECT pg_advisory_xact_lock(%s, {IN_THIS_LAB})", (LOCK_REGISTRY, "animals"))
    mapped = {name: (aid, lab_id) for name, aid, lab_id in pg.execute(
        "SELECT m.local_name, a.id, a.lab_id FROM pc_animals AS m JOIN animals AS a ON a.id = m.animal_id "
        "WHERE m.pc_id = %s", (pc,))}
    conflicts = []
    for name, lab_id in sorted(animals.items()):
        if name in mapped:
            aid, known = mapped[name]
            if lab_id is not None and known != lab_id:
                sharers = _pcs_of(pg, aid, pc)
                if known is not None and sharers:
                    conflicts.append(f"animal {name!r} on {pc_name} now has lab id {lab_id!r}, but the lab knows it "
                                     f"as {known!r}, shared with {', '.join(sharers)}")
                    continue
                pg.execute("UPDATE animals SET lab_id = %s WHERE id = %s", (lab_id, aid))
            continue
        same = pg.execute("SELECT id, lab_id FROM animals WHERE name = %s ORDER BY id", (name,)).fetchall()
        match = [aid for aid, known in same if lab_id is not None and known == lab_id]
        if match:
            target = match[0]
        elif same and (lab_id is None or any(known is None for _, known in same)):
            others = sorted({p for aid, _ in same for p in _pcs_of(pg, aid, pc)})
            conflicts.append(f"animal {name!r} is on {pc_name} and on {', '.join(others) or 'another PC'}, and no "
                             "lab id tells them apart: give it a lab id on each PC (the same one if it is the "
                             "same animal)")
            continue
        else:
            target = pg.execute("INSERT INTO animals (name, lab_id) VALUES (%s, %s) RETURNING id",
                                (name, lab_id)).fetchone()[0]
        pg.execute("INSERT INTO pc_animals (pc_id, local_name, animal_id) VALUES (%s, %s, %s)", (pc, name, target))
    if conflicts:
        pg.rollback()
        raise SyncRefused("; ".join(conflicts))
    pg.commit()


def _pcs_of(pg, animal_id: int, besides: int) -> list[str]:
    return [r[0] for r in pg.execute(
        "SELECT p.name FROM pc_animals AS m JOIN pcs AS p ON p.id = m.pc_id WHERE m.animal_id = %s "
        "AND m.pc_id <> %s ORDER BY p.id", (animal_id, besides))]


def _bookmarks(pg, pc: int) -> dict[str, int]:
    return dict(pg.execute("SELECT tbl, last_rowid FROM bookmarks WHERE pc_id = %s", (pc,)).fetchall())


def _set_bookmark(pg, pc: int, tbl: str, rowid: int) -> None:
    pg.execute("INSERT INTO bookmarks (pc_id, tbl, last_rowid) VALUES (%s, %s, %s) ON CONFLICT (pc_id, tbl) "
               "DO UPDATE SET last_rowid = EXCLUDED.last_rowid", (pc, tbl, rowid))


def _sync_mutable(pg, conn: sqlite3.Connection, pc: int, table: str, key_columns: tuple[str, ...] | None
                  ) -> tuple[int, set[str]]:
    """Send the table's new and changed rows, drop the ones gone; return (rows sent, keys touched)."""
    cur = conn.execute(f'SELECT rowid, * FROM "{table}"' if key_columns is None else f'SELECT * FROM "{table}"')
    columns = tuple(d[0] for d in cur.description)
    local: dict[str, tuple[str, str]] = {}
    for row in cur:
        if key_columns is None:
            key, values, names = str(row[0]), row[1:], columns[1:]
        else:
            key = json.dumps([row[columns.index(k)] for k in key_columns])
            values, names = row, columns
        local[key] = _canonical(names, values)[::-1]  # (digest, text)
    server = dict(pg.execute("SELECT key, digest FROM records WHERE pc_id = %s AND tbl = %s", (pc, table)))
    changed = [(pc, table, k, digest, text) for k, (digest, text) in local.items() if server.get(k) != digest]
    gone = [k for k in server if k not in local]
    if changed:
        with pg.cursor() as c:
            c.executemany("INSERT INTO records (pc_id, tbl, key, digest, data) VALUES (%s, %s, %s, %s, %s::jsonb) "
                          "ON CONFLICT (pc_id, tbl, key) DO UPDATE SET digest = EXCLUDED.digest, data = EXCLUDED.data, "
                          "synced_at = now()", changed)
    if gone:
        pg.execute("DELETE FROM records WHERE pc_id = %s AND tbl = %s AND key = ANY(%s)", (pc, table, gone))
    return len(changed) + len(gone), {row[2] for row in changed} | set(gone)


def _replace_trials(pg, conn: sqlite3.Connection, pc: int, sessions: set[str]) -> int:
    """The server's trials of these sessions replaced by the local ones; return the rows sent."""
    ids = sorted(int(k) for k in sessions)
    if not ids:
        return 0
    pg.execute("DELETE FROM trials WHERE pc_id = %s AND session_id = ANY(%s)", (pc, ids))
    sent = 0
    with pg.cursor().copy(f"COPY trials (pc_id, session_id, {', '.join(TRIAL_COLUMNS)}) FROM STDIN") as copy:
        for start in range(0, len(ids), 500):
            part = ids[start:start + 500]
            for row in conn.execute(f"SELECT session_id, {', '.join(TRIAL_COLUMNS)} FROM trials WHERE session_id "
                                    f"IN ({', '.join('?' * len(part))}) ORDER BY session_id, idx", part):
                copy.write_row((pc, *row))
                sent += 1
    return sent


def _copy_appended(pg, conn: sqlite3.Connection, pc: int, table: str, after: int, upto: int) -> int:
    """COPY the table's rows with rowid in (after, upto] to the server; return how many."""
    sent = 0
    if table == BULK:
        sql = (f"COPY events (pc_id, rid, {', '.join(_EVENT_COLUMNS)}) FROM STDIN")
        rows = conn.execute(f"SELECT rowid, {', '.join(_EVENT_COLUMNS)} FROM events WHERE rowid > ? AND rowid <= ? "
                            "ORDER BY rowid", (after, upto))
        with pg.cursor().copy(sql) as copy:
            for row in rows:
                copy.write_row((pc, *row))
                sent += 1
        return sent
    cur = conn.execute(f'SELECT rowid, * FROM "{table}" WHERE rowid > ? AND rowid <= ? ORDER BY rowid', (after, upto))
    names = tuple(d[0] for d in cur.description)[1:]
    with pg.cursor().copy("COPY records (pc_id, tbl, key, digest, data) FROM STDIN") as copy:
        for row in cur:
            text, digest = _canonical(names, row[1:])
            copy.write_row((pc, table, str(row[0]), digest, text))
            sent += 1
    return sent


def _push_appended(pg, conn: sqlite3.Connection, pc: int, table: str, after: int, upto: int, chunk_rows: int,
                   progress: Callable[[str, int, int], None] | None) -> int:
    """Chunks of (after, upto], each committed with its bookmark; return the rows sent."""
    sent = 0
    while after < upto:
        end = min(after + chunk_rows, upto)
        sent += _copy_appended(pg, conn, pc, table, after, end)
        _set_bookmark(pg, pc, table, end)
        pg.commit()
        after = end
        if progress is not None:
            progress(table, after, upto)
    return sent


def sync(conn: sqlite3.Connection, url: str, *, pc_name: str | None = None, chunk_rows: int = CHUNK_ROWS,
         progress: Callable[[str, int, int], None] | None = None) -> SyncResult:
    """Push everything new in the local store `conn` to the lab at `url` (see the module rule).

    LabUnreachable when the server does not answer or the connection drops (the local store
    records since when); LabBusy while another sync of this PC runs; SyncRefused for data the lab cannot
    take; LabError for a lab not set up.
    """
    psycopg = lab_driver()
    began = time.monotonic()
    ident, name = pc_identity(conn, pc_name)
    try:
        result = _sync(conn, url, ident, name, chunk_rows, progress)
    except LabUnreachable as exc:
        _note_unreachable(conn, str(exc))
        raise
    except psycopg.OperationalError as exc:
        message = f"lab server {shown(url)}: connection lost during the sync ({' '.join(str(exc).split())})"
        _note_unreachable(conn, message)
        raise LabUnreachable(message) from None
    except LabError as exc:  # refused or not set up: the server answered, the state says why
        _write_state(conn, {"unreachable_since": None, "last_error": str(exc)})
        raise
    result.seconds = time.monotonic() - began
    return result


def _note_unreachable(conn: sqlite3.Connection, message: str) -> None:
    since = _state(conn).get("unreachable_since") or time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime())
    _write_state(conn, {"unreachable_since": since, "last_error": message})


def _sync(conn: sqlite3.Connection, url: str, ident: str, name: str, chunk_rows: int,
          progress: Callable[[str, int, int], None] | None) -> SyncResult:
    pg = connect(url)
    try:
        require_current(pg, url)
        pc = _register_pc(pg, ident, name)
        if not pg.execute(f"SELECT pg_try_advisory_lock(%s, {IN_THIS_LAB})", (LOCK_SYNC, str(pc))).fetchone()[0]:
            raise LabBusy(f"another sync of {name} into {shown(url)} is running; try again when it ends")
        pg.commit()
        result = SyncResult(name, pc)
        _place_animals(pg, pc, name, _local_animals(conn))
        marks = _bookmarks(pg, pc)
        tables = _tables(conn)
        conn.execute("BEGIN")  # one local snapshot for the tables compared row by row and the trials
        try:
            ends = {t: conn.execute(f'SELECT coalesce(max(rowid), 0) FROM "{t}"').fetchone()[0]
                    for t in (BULK, *APPEND_ONLY) if t == BULK or t in tables}
            for table, key_columns in tables.items():
                if table in APPEND_ONLY:
                    continue
                sent, keys = _sync_mutable(pg, conn, pc, table, key_columns)
                result.sent[table] = sent
                if table == "trial_builds":
                    result.sent[DERIVED] = _replace_trials(pg, conn, pc, keys)
            pg.commit()
        finally:
            conn.execute("COMMIT")
        for table, end in ends.items():
            after = marks.get(table, 0)
            if end < after:
                raise SyncRefused(f"this store holds fewer {table} rows ({end}) than the lab already has from "
                                  f"{name} ({after}): a store restored from an older copy cannot feed the lab "
                                  "under the same PC identity")
            result.sent[table] = _push_appended(pg, conn, pc, table, after, end, chunk_rows, progress)
        pg.execute("UPDATE pcs SET last_sync = now() WHERE id = %s", (pc,))
        pg.commit()
        _write_state(conn, {"last_sync_at": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
                            "unreachable_since": None, "last_error": None}, ends)
        return result
    finally:
        pg.close()
