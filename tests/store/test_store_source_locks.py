"""One recorder per source: the lock row, its holder's name, stale locks taken over."""

from __future__ import annotations

import os
import socket
import subprocess
import sys
import time

import pytest

from monitor.store import source_locks
from monitor.store.db import open_store
from monitor.store.source_locks import SourceBusy, acquire, heartbeat, release, resource_key


@pytest.fixture
def conn(tmp_path):
    c = open_store(tmp_path / "store.sqlite3")
    yield c
    c.close()


def test_a_second_holder_is_refused_with_the_holder_named(conn):
    key = resource_key("file", "/lab/box1.rsw")
    assert acquire(conn, key, "rigside record") is None
    with pytest.raises(SourceBusy) as refused:
        acquire(conn, key, "the rigside window")
    text = str(refused.value)
    assert "rigside record" in text and f"process {os.getpid()}" in text and socket.gethostname() in text


def test_a_symlink_and_its_target_are_one_source(tmp_path):
    target = tmp_path / "box1.rsw"
    target.write_bytes(b"")
    link = tmp_path / "link.rsw"
    link.symlink_to(target)
    assert resource_key("file", str(link)) == resource_key("file", str(target))
    assert resource_key("serial", "socket://localhost:7000") == "serial:socket://localhost:7000"


def test_the_lock_of_a_process_that_ended_is_taken_over(conn):
    ended = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"], capture_output=True, text=True)
    dead_pid = int(ended.stdout)  # that process has exited: os.kill(pid, 0) raises ProcessLookupError (POSIX)
    now = time.time()
    conn.execute("INSERT INTO source_locks VALUES ('file:/lab/a.rsw', 'rigside record', ?, ?, ?, ?)",
                 (socket.gethostname(), dead_pid, now, now))
    notice = acquire(conn, "file:/lab/a.rsw", "rigside record")
    assert notice and "process has ended" in notice
    assert conn.execute("SELECT pid FROM source_locks").fetchall() == [(os.getpid(),)]


def test_a_lock_without_heartbeat_is_stale_and_a_fresh_one_holds(conn):
    now = time.time()
    conn.execute("INSERT INTO source_locks VALUES ('serial:/dev/ttyACM0', 'the rigside window', 'otherhost', 1, ?, ?)",
                 (now - 100, now - source_locks.STALE_S - 1))
    assert "no sign of life" in acquire(conn, "serial:/dev/ttyACM0", "rigside record")
    conn.execute("INSERT INTO source_locks VALUES ('serial:/dev/ttyACM1', 'the rigside window', 'otherhost', 1, ?, ?)",
                 (now, now))
    with pytest.raises(SourceBusy):
        acquire(conn, "serial:/dev/ttyACM1", "rigside record")
    heartbeat(conn, ["serial:/dev/ttyACM0"], now + 50)
    release(conn, ["serial:/dev/ttyACM0", "serial:/dev/ttyACM1"])  # only our own lock goes
    assert conn.execute("SELECT resource FROM source_locks").fetchall() == [("serial:/dev/ttyACM1",)]


def test_a_live_holder_on_this_host_keeps_its_lock_through_a_long_silence(conn):
    now = time.time()  # e.g. another process held the database's write lock for a minute
    conn.execute("INSERT INTO source_locks VALUES ('file:/lab/b.rsw', 'rigside record', ?, ?, ?, ?)",
                 (socket.gethostname(), os.getpid(), now - 90, now - 90))
    with pytest.raises(SourceBusy):
        acquire(conn, "file:/lab/b.rsw", "the rigside window", now)
    assert "no sign of life" in acquire(conn, "file:/lab/b.rsw", "rigside record", now + source_locks.REUSED_S)
