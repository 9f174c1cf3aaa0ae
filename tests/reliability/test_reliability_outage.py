"""A store outage: another process holds the database's write lock while a serial rig keeps sending.

`rigside record --source serial:LINK` reads a pty board. Another process takes
`BEGIN EXCLUSIVE` on the store and holds it for the outage; the board keeps
sending all the while. A serial device cannot be read again, so the recorder
must hold those events in memory (state "holding", shown on stderr), commit
nothing during the outage, and store every one of them, once, when the lock
is released. Short: a 2 s outage; long (--long): 10 s.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from collections import Counter

import pytest

from drivers.wire import encode_event, encode_header

pytestmark = pytest.mark.skipif(os.name != "posix", reason="pseudo-terminals are POSIX")

LOCKER = """
import sqlite3, sys, time
conn = sqlite3.connect(sys.argv[1], isolation_level=None, timeout=30)
conn.execute("BEGIN EXCLUSIVE")
print("locked", flush=True)
sys.stdin.readline()  # held until the test ends the outage
conn.execute("COMMIT")
print("released", flush=True)
"""


@pytest.mark.slow
@pytest.mark.parametrize("outage_s", [pytest.param(2.0, id="short"),
                                      pytest.param(10.0, id="long", marks=pytest.mark.long)])
def test_events_are_held_through_a_locked_store_and_written_afterwards(tmp_path, boards, recorder, kit, outage_s):
    link = tmp_path / "rig-by-id"
    board = boards()
    kit.point_link(link, board.name)
    proc = subprocess.Popen(recorder.args(f"serial:{link}"), stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    stderr = kit.StderrLines(proc)

    def stored() -> int:
        rows = kit.query(recorder.db, "SELECT count(*) FROM events")
        return rows[0][0] if rows else 0

    sent = 0
    locker: subprocess.Popen | None = None

    def send(n: int) -> None:
        nonlocal sent
        board.write(b"".join(encode_event(sent + i, "lick") for i in range(n)))
        sent += n

    try:
        kit.wait_for(lambda: stderr.has("record: connected"), 30, "recorder opened the port")
        board.write(encode_header(fw="outage"))
        send(100)
        kit.wait_for(lambda: stored() == sent, 20, "events before the outage stored")
        locker = subprocess.Popen([sys.executable, "-c", LOCKER, str(recorder.db)],
                                  stdin=subprocess.PIPE, stdout=subprocess.PIPE, text=True)
        assert locker.stdout.readline().strip() == "locked"
        before, during = sent, []
        end = time.monotonic() + outage_s
        while time.monotonic() < end:  # the rig keeps sending all through the outage
            send(25)
            time.sleep(0.1)  # the rig's pace, not synchronisation
            during.append(stored())  # read while the lock is certainly still held
        kit.wait_for(lambda: stderr.has("holding"), 10, "the recorder reports it is holding rows")
        locker.stdin.write("release\n")
        locker.stdin.flush()
        assert locker.stdout.readline().strip() == "released"
        locker.wait(10)
        held = sent - before
        kit.wait_for(lambda: stored() == sent, 30, "held events written after the outage")
    finally:
        if locker is not None and locker.poll() is None:
            locker.kill()
        proc.send_signal(signal.SIGTERM)
        proc.wait(30)
    err = stderr.text
    counts = Counter(t for (t,) in kit.query(recorder.db, "SELECT raw_time FROM events"))
    lost = sum(1 for t in range(sent) if t not in counts)
    duplicated = sum(n - 1 for n in counts.values() if n > 1)
    committed_during = max(during) - before
    print(f"\noutage: store locked by another process for {outage_s:g} s, {held} events held in memory "
          f"(committed during the outage: {committed_during}), {sent} sent, {sum(counts.values())} stored, "
          f"events lost: {lost}, duplicated: {duplicated}, recorder exit {proc.returncode}")
    assert proc.returncode == 0, err
    assert "holding" in err
    assert committed_during == 0  # nothing got through the lock: the rows were held, not lost or forced
    assert lost == 0 and duplicated == 0 and held > 0
