"""Rotations and truncations of a followed log file: FileTail -> Fanout -> StoreWriter.

Operations alternate. A rotation renames the log away and starts a new one at
the path, while the logging program still appends a few last lines to the old
file (its handle is still open): those must be drained from the old file and
the new one read from byte 0. A truncation (copytruncate) empties the file
once the reader has caught up and the logger goes on writing from byte 0. The
rules the reader documents are kept: a truncated file must not be refilled
past the old read position before the reader has seen it shrink, and a file is
not rotated away twice before the reader has opened it (docs/sources.md).
Every line written must be stored exactly once. Short: 5 operations; long
(--long): 50.
"""

from __future__ import annotations

import os
import random
from collections import Counter

import pytest

from drivers.tail import FileTail
from drivers.wire import encode_event
from monitor.app.live.pipeline import Fanout
from monitor.store import db
from monitor.store.writer import StoreWriter


class Logger:
    """A logging program: numbered lines, written in odd-sized pieces, to a handle it keeps open."""

    def __init__(self, path, rng: random.Random) -> None:
        self.path, self.rng = path, rng
        self.fh = open(path, "ab", buffering=0)  # noqa: SIM115 - a logger keeps its file open
        self.written = 0

    def lines(self, n: int) -> None:
        data = b"".join(encode_event(self.written + i, "lick") for i in range(n))
        self.written += n
        while data:
            step = self.rng.randint(1, 700)
            self.fh.write(data[:step])
            data = data[step:]

    def rotate(self, to) -> None:
        os.rename(self.path, to)
        self.lines(self.rng.randint(1, 20))  # still appended to the old file through the open handle
        self.fh.close()
        self.fh = open(self.path, "ab", buffering=0)  # noqa: SIM115

    def truncate(self) -> None:
        self.fh.truncate(0)
        self.fh.seek(0)

    def close(self) -> None:
        self.fh.close()


@pytest.mark.parametrize("operations", [pytest.param(5, id="short"),
                                        pytest.param(50, id="long", marks=[pytest.mark.long,
                                                                           pytest.mark.timeout(1800)])])
def test_rotations_and_truncations_store_every_line_once(tmp_path, kit, operations):
    writer = StoreWriter(tmp_path / "store.sqlite3")
    writer.start()
    path = tmp_path / "box1.log"
    source_id = writer.call(lambda c: db.register_source(c, "file", str(path), "box1"))
    session_id = writer.call(lambda c: db.start_session(c, source_id, "heron", "box1", "p", 1, None))
    rng = random.Random(operations)
    log = Logger(path, rng)
    tail = FileTail(path, Fanout(writer, source_id=source_id, session_id=session_id, live=False),
                    should_pause=lambda: writer.backlogged, poll_s=0.05)
    tail.start()
    rotations = truncations = 0
    try:
        log.lines(500)
        # the reader must have the file open before it is first rotated away: a file renamed before the
        # reader ever opened it is one it cannot know about (a race of the test, seen under a loaded CPU)
        kit.wait_for(lambda: tail.status().events == log.written, 20, "first lines read")
        for op in range(operations):
            if op % 2 == 0:
                rotations += 1
                log.rotate(tmp_path / f"box1.log.{rotations}")
                log.lines(rng.randint(100, 600))
                kit.wait_for(lambda: tail.status().events == log.written, 20, f"rotation {rotations} read")
            else:
                kit.wait_for(lambda: tail.status().events == log.written, 20, "caught up before truncation")
                truncations += 1
                log.truncate()
                log.lines(rng.randint(1, 5))  # less than the file held: the reader sees it shrink
                kit.wait_for(lambda: tail.status().events == log.written, 20, f"truncation {truncations} read")
                log.lines(rng.randint(100, 600))
        kit.wait_for(lambda: tail.status().events == log.written, 20, "last lines read")
    finally:
        tail.stop()
        log.close()
    assert writer.stop(timeout=30), writer.status().text
    stored = Counter(t for (t,) in kit.query(writer.path, "SELECT raw_time FROM events"))
    notices = [text for (text,) in kit.query(writer.path, "SELECT reason FROM raw_lines WHERE kind = 'notice'")]
    malformed = kit.query(writer.path, "SELECT count(*) FROM raw_lines WHERE kind = 'malformed'")[0][0]
    lost = sum(1 for t in range(log.written) if t not in stored)
    duplicated = sum(n - 1 for n in stored.values() if n > 1)
    print(f"\nrotation: {rotations} rotations and {truncations} truncations survived, {log.written} lines written, "
          f"{sum(stored.values())} stored, events lost: {lost}, duplicated: {duplicated}, malformed: {malformed}, "
          f"notices: {sum('rotated' in n for n in notices)} rotated / {sum('truncated' in n for n in notices)} "
          f"truncated")
    assert lost == 0 and duplicated == 0 and malformed == 0
    assert sorted(stored) == list(range(log.written))
    assert sum("rotated" in n for n in notices) == rotations
    assert sum("truncated" in n for n in notices) == truncations
