"""Unplug and re-plug cycles on pseudo-terminals: SerialSource -> Fanout -> StoreWriter.

Each cycle the board boots (header line), sends its events, the test waits
until the reader has taken them (bytes still unread when a master closes are
lost, as on a real cable), then pulls the cable (closes the master) and plugs
a new pty in behind the same symlink, as udev re-points /dev/serial/by-id.
Every event sent must be in the store exactly once, and every unplug must be
a gap row. Short: 5 cycles; long (--long): 100.
"""

from __future__ import annotations

import os
from collections import Counter

import pytest

from drivers.serial import SerialSource
from drivers.status import CONNECTED, READING, WAITING
from drivers.wire import encode_event, encode_header
from monitor.app.live.pipeline import Fanout
from monitor.store import db
from monitor.store.writer import StoreWriter

pytestmark = pytest.mark.skipif(os.name != "posix", reason="pseudo-terminals are POSIX")
EVENTS_PER_CYCLE = 200


@pytest.mark.slow
@pytest.mark.parametrize("cycles", [pytest.param(5, id="short"),
                                    pytest.param(100, id="long", marks=[pytest.mark.long, pytest.mark.timeout(1800)])])
def test_unplug_replug_cycles_lose_and_duplicate_nothing(tmp_path, boards, kit, cycles):
    writer = StoreWriter(tmp_path / "store.sqlite3")
    writer.start()
    source_id = writer.call(lambda c: db.register_source(c, "serial", str(tmp_path / "rig-by-id"), "box1"))
    session_id = writer.call(lambda c: db.start_session(c, source_id, "heron", "box1", "p", 1, None))
    link = tmp_path / "rig-by-id"
    board = boards()
    kit.point_link(link, board.name)
    source = SerialSource(str(link), Fanout(writer, source_id=source_id, session_id=session_id, live=True))
    source.start()
    sent = 0
    try:
        for cycle in range(cycles):
            # "connected" is set after open() returned, i.e. after pyserial flushed the input
            kit.wait_for(lambda n=cycle: source.status().state in (CONNECTED, READING) and source.status().gaps == n,
                         10, f"connected for cycle {cycle}")
            board.write(encode_header(fw="reliability") + b"".join(
                encode_event(sent + i, "lever_down" if i % 2 else "lick") for i in range(EVENTS_PER_CYCLE)))
            sent += EVENTS_PER_CYCLE
            kit.wait_for(lambda n=sent: source.status().events == n, 10, f"cycle {cycle} read")
            new = boards()  # made before the old one closes, so it gets a new device name
            board.unplug()
            kit.wait_for(lambda: source.status().state == WAITING, 10, "unplug noticed")
            kit.point_link(link, new.name)
            board = new
        kit.wait_for(lambda: source.status().gaps == cycles, 10, "last re-plug")
    finally:
        source.stop()
    assert writer.stop(timeout=30), writer.status().text
    stored = Counter(t for (t,) in kit.query(writer.path, "SELECT raw_time FROM events"))
    gaps = kit.query(writer.path, "SELECT reason FROM gaps")
    lost = sum(1 for t in range(sent) if t not in stored)
    duplicated = sum(n - 1 for n in stored.values() if n > 1)
    unplugs = sum("unplugged" in reason for (reason,) in gaps)
    print(f"\nunplug: {cycles} unplug/re-plug cycles survived, {sent} events sent, {sum(stored.values())} stored, "
          f"events lost: {lost}, duplicated: {duplicated}, gaps recorded: {unplugs}, "
          f"reader state: {source.status().state}")
    assert lost == 0 and duplicated == 0
    assert sorted(stored) == list(range(sent))
    assert unplugs == cycles
