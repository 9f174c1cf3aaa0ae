"""Shared pieces of the reliability suite: a live serial session, reading a store, running `rigside record`.

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
from typing import Any, Callable

import pytest

from drivers.serial import SerialSource
from drivers.status import CONNECTED, READING, WAITING
from fixtures.devices import PtyBoard, StderrLines, point_link
from fixtures.protocols import protocol_toml
from fixtures.sessions import wait_for
from monitor.app.live.pipeline import Fanout
from monitor.store import db
from monitor.store.writer import StoreWriter

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


class SerialRun:
    """A store with one live serial session, fed by a `SerialSource` on the pty board behind `link`."""

    def __init__(self, folder: Path, boards: Callable[[], PtyBoard], **source_options: Any) -> None:
        self.link = folder / "rig-by-id"
        self.writer = StoreWriter(folder / "store.sqlite3")
        self.writer.start()
        source_id = self.writer.call(lambda c: db.register_source(c, "serial", str(self.link), "box1"))
        session_id = self.writer.call(lambda c: db.start_session(c, source_id, "heron", "box1", "p", 1, None))
        self._boards = boards
        self.board = boards()
        point_link(self.link, self.board.name)
        self.source = SerialSource(str(self.link), Fanout(self.writer, source_id=source_id, session_id=session_id,
                                                          live=True), **source_options)

    def replug_cycle(self, cycle: int, data: bytes, sent: int) -> None:
        """Wait for the reader (`cycle` gaps so far), send `data` (`sent` events in all), then re-plug the cable."""
        source = self.source
        # "connected" is set after open() returned, i.e. after pyserial flushed the input
        wait_for(lambda: source.status().state in (CONNECTED, READING) and source.status().gaps == cycle,
                 10, f"connected for cycle {cycle}")
        self.board.write(data)
        wait_for(lambda: source.status().events == sent, 10, f"cycle {cycle} read")
        new = self._boards()  # made before the old one closes, so it gets a new device name
        self.board.unplug()
        wait_for(lambda: source.status().state == WAITING, 10, "unplug noticed")
        point_link(self.link, new.name)
        self.board = new


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
def serial_run(tmp_path: Path, boards) -> Callable[..., SerialRun]:
    """Make the `SerialRun` of this test, with these `SerialSource` options."""
    return lambda **options: SerialRun(tmp_path, boards, **options)


@pytest.fixture
def recorder(tmp_path: Path) -> Recorder:
    return Recorder(tmp_path)
