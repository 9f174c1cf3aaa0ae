"""Who records a source: one lock row per source in the store, naming its holder.

Rule: a source (a file by its real path, a serial device by its real path or
URL) is recorded into a store by one process at a time. `acquire` runs in the
caller's `BEGIN IMMEDIATE` transaction, so two processes starting at once are
served in turn: the second is refused with `SourceBusy` naming the holder
(what it is, host, process id, since when). A lock is stale, and is taken over
with a notice, when on the same POSIX host its process no longer exists (a
recorder killed with SIGKILL) or has not refreshed it for `REUSED_S` (its id
now belongs to another program), or, from another host or on Windows, when
its heartbeat is older than `STALE_S`. The
holder's store writer refreshes the heartbeat every `HEARTBEAT_S` and releases
its locks when it stops.
"""

from __future__ import annotations

import os
import socket
import sqlite3
import time
from datetime import datetime

HEARTBEAT_S = 5.0
STALE_S = 30.0  # six missed heartbeats: a holder on another host is gone (or cannot reach the file)
REUSED_S = 600.0  # a live process on this host that has not beaten for this long is not the holder


class SourceBusy(Exception):
    """Another process records this source into this store; the message names it."""


def resource_key(kind: str, path: str) -> str:
    """The lock's name for a source: the real path behind symlinks, or the URL as given."""
    if kind == "serial" and "://" in path:
        return f"serial:{path}"
    return f"{kind}:{os.path.realpath(path)}"


def _alive(host: str, pid: int) -> bool | None:
    """Is process `pid` on `host` running? None when this host cannot tell."""
    if host != socket.gethostname() or os.name != "posix":
        return None  # on Windows os.kill(pid, 0) would send CTRL_C_EVENT: rely on the heartbeat there
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


def acquire(conn: sqlite3.Connection, key: str, holder: str, now: float | None = None) -> str | None:
    """Take the lock on `key` for this process (inside the caller's transaction).

    Returns a notice when a stale lock was taken over, else None; raises
    `SourceBusy` when a live holder has it.
    """
    now = time.time() if now is None else now
    busy = holder_of(conn, key, now)
    if busy is not None:
        raise SourceBusy(f"{busy}; stop it first")
    row = conn.execute("SELECT holder, host, pid, heartbeat_at FROM source_locks WHERE resource = ?",
                       (key,)).fetchone()
    notice = None
    if row is not None:  # a stale holder's
        other, host, pid, beat = row
        why = "its process has ended" if _alive(host, pid) is False else f"no sign of life for {now - beat:.0f} s"
        notice = f"took over the lock of {other} (process {pid} on {host}): {why}"
        conn.execute("DELETE FROM source_locks WHERE resource = ?", (key,))
    conn.execute("INSERT INTO source_locks (resource, holder, host, pid, taken_at, heartbeat_at) "
                 "VALUES (?, ?, ?, ?, ?, ?)", (key, holder, socket.gethostname(), os.getpid(), now, now))
    return notice


def holder_of(conn: sqlite3.Connection, key: str, now: float | None = None) -> str | None:
    """Who records `key` into this store now, in words (None when nobody does, or only a stale holder)."""
    now = time.time() if now is None else now
    row = conn.execute("SELECT holder, host, pid, taken_at, heartbeat_at FROM source_locks WHERE resource = ?",
                       (key,)).fetchone()
    if row is None:
        return None
    other, host, pid, taken_at, beat = row
    alive = _alive(host, pid)
    # same host: the process decides (a writer kept off the file by a long lock is still the holder);
    # its id reused by another program after a crash shows as a heartbeat silent for REUSED_S
    if alive is False or now - beat > (REUSED_S if alive else STALE_S):
        return None
    since = datetime.fromtimestamp(taken_at).astimezone().isoformat(timespec="seconds")
    return (f"{key.partition(':')[2]} is being recorded into this database by {other} "
            f"(process {pid} on {host}, since {since})")


def heartbeat(conn: sqlite3.Connection, keys: list[str], now: float | None = None) -> None:
    """Refresh this process's locks on `keys`."""
    now = time.time() if now is None else now
    conn.executemany("UPDATE source_locks SET heartbeat_at = ? WHERE resource = ? AND host = ? AND pid = ?",
                     [(now, key, socket.gethostname(), os.getpid()) for key in keys])


def release(conn: sqlite3.Connection, keys: list[str]) -> None:
    """Give up this process's locks on `keys` (another's are left alone)."""
    conn.executemany("DELETE FROM source_locks WHERE resource = ? AND host = ? AND pid = ?",
                     [(key, socket.gethostname(), os.getpid()) for key in keys])
