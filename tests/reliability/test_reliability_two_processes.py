"""Two processes writing one database: two `rigside record` runs, each following its own growing file.

Each recorder has its own single writer, so the two take turns at SQLite's
write lock (BEGIN IMMEDIATE, busy timeouts, retries while "holding"), and a
third process reads the store (`rigside export events`) while they run. Both
files are appended to in odd-sized pieces at the same time. Every line of each
file must end up in its own session exactly once, both recorders must exit 0
on SIGTERM, and the export must succeed while they write. Short: 10,000 lines
per file; long (--long): 100,000.
"""

from __future__ import annotations

import random
import signal
import subprocess
import sys
import threading
from collections import Counter

import pytest

from drivers.wire import encode_event, encode_header


def grow(path, lines: int, seed: int, done: threading.Event) -> None:
    """A logging program appending `lines` numbered lines in odd-sized pieces."""
    rng = random.Random(seed)
    data = encode_header(fw=f"box{seed}") + b"".join(encode_event(i, "lick") for i in range(lines))
    at = 0
    while at < len(data):
        step = rng.randint(100, 4000)
        with open(path, "ab") as fh:
            fh.write(data[at:at + step])
        at += step
        done.wait(0.005)  # the logger's pace, not synchronisation
    done.set()


@pytest.mark.slow
@pytest.mark.parametrize("lines", [pytest.param(10_000, id="short"),
                                   pytest.param(100_000, id="long", marks=[pytest.mark.long,
                                                                          pytest.mark.timeout(1800)])])
def test_two_recorders_and_a_reader_share_one_database(tmp_path, recorder, kit, lines):
    logs = [tmp_path / "box1.rsw", tmp_path / "box2.rsw"]
    for log in logs:
        log.write_bytes(b"")
    procs = [subprocess.Popen(recorder.args(f"file:{log}", log.stem), stdout=subprocess.DEVNULL,
                              stderr=subprocess.PIPE) for log in logs]
    errs = [kit.StderrLines(p) for p in procs]
    done = [threading.Event(), threading.Event()]
    growers = [threading.Thread(target=grow, args=(log, lines, i + 1, done[i]), daemon=True)
               for i, log in enumerate(logs)]

    def per_rig() -> dict[str, int]:
        return dict(kit.query(recorder.db, "SELECT s.rig, count(*) FROM events e JOIN sessions s "
                                           "ON s.id = e.session_id GROUP BY s.rig"))

    exports = 0
    try:
        try:
            kit.wait_for(lambda: all(e.has("byte 0") for e in errs) or any(p.poll() is not None for p in procs),
                         30, "both recorders started")
        except AssertionError as exc:
            raise AssertionError(f"{exc}; they printed {[e.lines for e in errs]}") from None
        assert all(p.poll() is None for p in procs), [e.text for e in errs]
        for g in growers:
            g.start()
        while not all(d.is_set() for d in done):  # a reader in a third process while both write
            out = subprocess.run([sys.executable, "-m", "monitor.app", "export", "events", "--db", str(recorder.db),
                                  "--csv", str(tmp_path / f"export{exports}.csv")],
                                 capture_output=True, text=True, timeout=60)
            assert out.returncode == 0, out.stderr
            exports += 1
        kit.wait_for(lambda: per_rig() == {"box1": lines, "box2": lines}, 120, "both files stored")
    finally:
        for p in procs:
            p.send_signal(signal.SIGTERM)
        for p in procs:
            p.wait(30)
    text = [e.text for e in errs]
    rows = kit.query(recorder.db, "SELECT s.rig, e.raw_time FROM events e JOIN sessions s ON s.id = e.session_id")
    lost = dup = 0
    for rig in ("box1", "box2"):
        counts = Counter(t for r, t in rows if r == rig)
        lost += sum(1 for t in range(lines) if t not in counts)
        dup += sum(n - 1 for n in counts.values() if n > 1)
    holding = sum(t.count("holding") for t in text)
    print(f"\ntwo processes: 2 recorders x {lines} lines into one database with {exports} exports read "
          f"meanwhile, {len(rows)} stored, events lost: {lost}, duplicated: {dup}, 'holding' reports: {holding}, "
          f"exit codes {[p.returncode for p in procs]}")
    assert [p.returncode for p in procs] == [0, 0], text
    assert lost == 0 and dup == 0 and len(rows) == 2 * lines
