"""Shared pieces of the reliability suite: waiting on conditions, pty boards, reading a store, running record.

Rule: tests wait on conditions with deadlines (`wait_for`), never on fixed
sleeps; a pty board writes with a timeout (a master blocks once ~17 KB are
unread) and unplugs by closing its master; the store is read in read-only
autocommit connections, so a reader never holds the writer up.
"""

from __future__ import annotations

import os
import select
import sqlite3
import subprocess
import sys
import threading
import time
from collections.abc import Callable
from pathlib import Path
from types import SimpleNamespace

import pytest

PROTOCOL = """
[protocol]
name = "two-press 650 ms"
version = 1
task = "two_press"
target_ms = 650
tolerance = 0.2
"""


def wait_for(condition: Callable[[], object], timeout: float = 30.0, what: str = "condition") -> None:
    deadline = time.monotonic() + timeout
    while not condition():
        if time.monotonic() > deadline:
            raise AssertionError(f"timed out after {timeout:g} s waiting for {what}")
        time.sleep(0.01)


class PtyBoard:
    """The device end of a pseudo-terminal."""

    def __init__(self) -> None:
        import pty
        import tty

        self.master, self.slave = pty.openpty()
        tty.setraw(self.master)
        self.name = os.ttyname(self.slave)
        self.plugged = True

    def write(self, data: bytes, timeout: float = 10.0) -> None:
        deadline = time.monotonic() + timeout
        while data:
            _, ready, _ = select.select([], [self.master], [], max(0.0, deadline - time.monotonic()))
            if not ready:
                raise TimeoutError("pty master not writable: the reader is not draining")
            data = data[os.write(self.master, data):]

    def unplug(self) -> None:
        if self.plugged:
            self.plugged = False
            os.close(self.master)
            os.close(self.slave)


def point_link(link: Path, target: str) -> None:
    """Re-point a symlink atomically (what udev does for /dev/serial/by-id)."""
    tmp = link.with_name(link.name + ".new")
    tmp.unlink(missing_ok=True)
    os.symlink(target, tmp)
    os.replace(tmp, link)


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


class StderrLines:
    """Collects a subprocess's stderr lines as they come."""

    def __init__(self, proc: subprocess.Popen) -> None:
        self.lines: list[str] = []
        self._thread = threading.Thread(target=self._read, args=(proc,), daemon=True)
        self._thread.start()

    def _read(self, proc: subprocess.Popen) -> None:
        for raw in proc.stderr:
            self.lines.append(raw.decode("utf-8", "replace"))

    def has(self, text: str) -> bool:
        return any(text in line for line in list(self.lines))

    @property
    def text(self) -> str:
        self._thread.join(10)
        return "".join(self.lines)


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


@pytest.fixture
def boards():
    """Make pty boards; the ones still plugged are unplugged at the end."""
    made: list[PtyBoard] = []

    def make() -> PtyBoard:
        board = PtyBoard()
        made.append(board)
        return board

    yield make
    for board in made:
        board.unplug()
