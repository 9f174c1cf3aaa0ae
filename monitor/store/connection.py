"""The store's connection and error types, named for callers outside the store.

Rule: only monitor/store imports sqlite3. Code outside the store that holds a
connection or catches the store's low-level failures uses these names:
`Connection` (an open store), `Busy` (the lock was not freed in time, or
the file could not be opened for writing) and `DatabaseError` (any failure
of the file, a damaged one included). They are sqlite3's own classes, so
nothing is wrapped. `database_path` names the file behind a connection.
"""

from __future__ import annotations

import sqlite3
from pathlib import Path

Connection = sqlite3.Connection
Busy = sqlite3.OperationalError
DatabaseError = sqlite3.DatabaseError


def database_path(conn: Connection) -> Path | None:
    """The file behind the connection's main database (None for an in-memory one)."""
    for _, name, file in conn.execute("PRAGMA database_list"):
        if name == "main":
            return Path(file) if file else None
    return None
