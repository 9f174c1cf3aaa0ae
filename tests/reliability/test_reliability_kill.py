"""Repeated SIGKILL of `rigside record --source file:...` while acquisition code keeps appending.

A thread appends lines in odd-sized pieces (cut mid-line) for as long as the
test runs; a recorder is started, killed with SIGKILL as soon as it has stored
something new (plus a random extra moment, so kills land in different phases:
between polls, mid-batch, mid-commit), and started again. When the kills are
done the file stops growing and one last recorder runs to the end. Every line
written must be in the store exactly once, in order: the file offset is
committed in the same transaction as the events. Short: 3 kills; long
(--long): 20.
"""

from __future__ import annotations

import random
import signal
import subprocess
import threading
import time
from collections import Counter

import pytest

from drivers.wire import encode_event, encode_header


class GrowingLog:
    """Acquisition code appending to a log file in odd-sized pieces until told to stop."""

    def __init__(self, path) -> None:
        self.path = path
        self.path.write_bytes(encode_header(fw="grow"))
        self.lines = 0
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, daemon=True)
        self._thread.start()

    def _run(self) -> None:
        rng = random.Random(5)
        pending = b""
        while not self._stop.is_set() or pending:
            while len(pending) < 4096 and not self._stop.is_set():
                pending += encode_event(self.lines, ("lever_down", "lever_up", "lick")[self.lines % 3])
                self.lines += 1
            step = len(pending) if self._stop.is_set() else rng.randint(50, 1500)
            with open(self.path, "ab") as fh:
                fh.write(pending[:step])
            pending = pending[step:]
            self._stop.wait(0.01)  # the pace of a logging program (~100 writes/s), not synchronisation

    def stop(self) -> int:
        self._stop.set()
        self._thread.join(10)
        return self.lines


@pytest.mark.slow
@pytest.mark.parametrize("kills", [pytest.param(3, id="short"),
                                   pytest.param(20, id="long", marks=[pytest.mark.long, pytest.mark.timeout(1800)])])
def test_sigkilled_recorder_stores_every_line_once(tmp_path, recorder, kit, kills):
    log = GrowingLog(tmp_path / "box1.rsw")
    args = recorder.args(f"file:{log.path}")

    def count() -> int:
        rows = kit.query(recorder.db, "SELECT count(*) FROM events")
        return rows[0][0] if rows else 0

    rng = random.Random(kills)
    try:
        for kill in range(kills):
            before = count()
            proc = subprocess.Popen(args, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
            try:
                kit.wait_for(lambda n=before: count() > n, 30, f"progress before kill {kill + 1}")
                time.sleep(rng.random() * 0.3)  # where the kill lands, not synchronisation
            finally:
                proc.send_signal(signal.SIGKILL)
                proc.wait(10)
    finally:
        total = log.stop()
    last = subprocess.Popen(args, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    stderr = kit.StderrLines(last)
    kit.wait_for(lambda: count() >= total, 60, "the last recorder caught up")
    last.send_signal(signal.SIGTERM)
    last.wait(30)
    assert last.returncode == 0, stderr.text
    stored = [t for (t,) in kit.query(recorder.db, "SELECT raw_time FROM events ORDER BY rowid")]
    counts = Counter(stored)
    lost = sum(1 for t in range(total) if t not in counts)
    duplicated = sum(n - 1 for n in counts.values() if n > 1)
    sessions = kit.query(recorder.db, "SELECT count(*), count(ended_at) FROM sessions")[0]
    print(f"\nkill: {kills} SIGKILLs survived while the file grew, {total} lines written, {len(stored)} stored, "
          f"events lost: {lost}, duplicated: {duplicated}, sessions {sessions[0]} ({sessions[1]} closed cleanly)")
    assert lost == 0 and duplicated == 0
    assert stored == list(range(total))  # every line once, in order
    assert sessions == (kills + 1, 1)
