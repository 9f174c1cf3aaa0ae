"""Shared pieces of the reliability suite: reading a store and running `rigside record`.

Rule: tests wait on conditions with deadlines (`wait_for`, tests/fixtures), never on
fixed sleeps; pty boards come from the shared `boards` fixture (tests/fixtures/devices.py);
the store is read in read-only autocommit connections, so a reader never holds the
writer up.
"""

from __future__ import annotations

import sqlite3
import sys
from pathlib import Path
from types import SimpleNamespace

import pytest

from fixtures.devices import StderrLines, point_link
from fixtures.protocols import protocol_toml
from fixtures.sessions import wait_for

PROTOCOL = protocol_toml()


def query(db: Path, sql: str, args: tuple = ()) -> list[tuple]:
    """Rows of a read-only query; [] while the store or its tables do not exist yet."""
    if not db.exists():
        return []
    conn = sqlite3.connect(f"file:{db}?mode=ro", uri=True, timeout=10, isolation_level=None)
    try:
        return conn.execute(sql, args).fetchall()
    except sqlite3.OperationalError as exc:
        if "no such table" in str(exc):
            return []
        raise
    finally:
        conn.close()


class Recorder:
    """Builds `rigside record` command lines for one store."""

    def __init__(self, folder: Path) -> None:
        self.folder = folder
        self.db = folder / "store.sqlite3"
        self.protocol = folder / "protocol.toml"
        self.protocol.write_text(PROTOCOL)

    def args(self, source: str, rig: str = "box1", *extra: str) -> list[str]:
        return [sys.executable, "-m", "monitor.app", "record", "--source", source, "--rig", rig, "--new-animal",
                "--animal", f"animal-{rig}", "--protocol", str(self.protocol), "--db", str(self.db), *extra]


@pytest.fixture
def kit() -> SimpleNamespace:
    """The helpers above, for test modules (which cannot import this file under --import-mode=importlib)."""
    return SimpleNamespace(wait_for=wait_for, query=query, point_link=point_link, StderrLines=StderrLines)


@pytest.fixture
def recorder(tmp_path: Path) -> Recorder:
    return Recorder(tmp_path)
