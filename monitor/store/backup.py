"""A consistent copy of the store while it is in use: SQLite's online backup API.

Rule: the copy is taken from one read snapshot (`Connection.backup` in a single
step), so a recorder or the window may go on writing meanwhile (WAL: readers
and the writer do not block each other), and it includes what is still in the
write-ahead log, which a plain file copy would miss. It is written under a
temporary twin beside the target (monitor.store.twins), checked with
`quick_check`, and only then renamed to the target, so a target name never
holds half a copy. An existing target is never overwritten, also not one that
another backup put there meanwhile: the copy takes the name by a hard link,
which fails when the name exists (where the file system has no hard links,
by a rename after a last check).
"""

from __future__ import annotations

import os
import sqlite3
from pathlib import Path
from typing import NamedTuple

from monitor.store.db import StoreError, open_store
from monitor.store.twins import twin


class BackupResult(NamedTuple):
    path: Path
    bytes: int
    sessions: int
    events: int


def backup_store(source: Path, target: Path) -> BackupResult:
    """Copy the store at `source` to the new file `target`; StoreError names what went wrong."""
    if target.exists():
        raise StoreError(f"{target}: already exists; a backup never overwrites a file (choose a new name)")
    if target.resolve() == source.resolve():
        raise StoreError(f"{target}: is the database itself")
    try:
        target.parent.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise StoreError(f"{target}: cannot create the folder {target.parent} ({exc.strerror or exc})") from None
    conn = open_store(source, readonly=True)
    partial = None
    try:
        partial = twin(target)
        copy = sqlite3.connect(partial)
        try:
            conn.backup(copy)  # pages=-1: the whole file from one snapshot
            copy.execute("PRAGMA journal_mode = DELETE")  # one self-contained file
            check = [row[0] for row in copy.execute("PRAGMA quick_check(3)")]
            if check != ["ok"]:
                raise StoreError(f"{source}: the copy fails SQLite's check ({'; '.join(check)[:200]}); "
                                 "the database itself is damaged")
            sessions = copy.execute("SELECT count(*) FROM sessions").fetchone()[0]
            events = copy.execute("SELECT count(*) FROM events").fetchone()[0]
        finally:
            copy.close()
        _take_name(partial, target)
    except sqlite3.Error as exc:
        raise StoreError(f"{target}: the backup failed ({exc}); nothing was written under that name") from None
    except OSError as exc:
        raise StoreError(f"{target}: the backup failed ({exc.strerror or exc}); nothing was written under that "
                         "name") from None
    finally:
        conn.close()
        if partial is not None:
            partial.unlink(missing_ok=True)
    return BackupResult(target, target.stat().st_size, sessions, events)


def _take_name(copy: Path, target: Path) -> None:
    """Give the finished copy the name `target` unless a file of that name exists (the module rule)."""
    try:
        os.link(copy, target)
    except FileExistsError:
        raise StoreError(f"{target}: already exists (another backup took the name meanwhile); a backup never "
                         "overwrites a file (choose a new name)") from None
    except OSError:  # no hard links here (FAT, some network shares)
        if target.exists():
            raise StoreError(f"{target}: already exists; a backup never overwrites a file (choose a new "
                             "name)") from None
        os.replace(copy, target)
