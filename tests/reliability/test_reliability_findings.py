"""A case per data-path finding: one recorder per source, headerless boards, crafted clocks, typo sources.

Each case prints events sent / stored / lost / duplicated (`-s` shows them;
`--long` runs the larger sizes). The store is read in read-only connections.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
from collections import Counter

import pytest

from drivers.wire import encode_event, encode_header


def counts(kit, path, sent: int, sql: str = "SELECT raw_time FROM events") -> tuple[int, int, int]:
    stored = Counter(t for (t,) in kit.query(path, sql))
    lost = sum(1 for t in range(sent) if t not in stored)
    return sum(stored.values()), lost, sum(n - 1 for n in stored.values() if n > 1)


@pytest.mark.parametrize("lines", [pytest.param(5_000, id="short"),
                                   pytest.param(50_000, id="long", marks=[pytest.mark.long, pytest.mark.timeout(900)])])
@pytest.mark.slow  # three recorders in child processes
def test_a_second_recorder_of_one_file_is_refused_and_a_killed_holder_is_taken_over(tmp_path, recorder, kit, lines):
    log = tmp_path / "box1.rsw"
    log.write_bytes(encode_header() + b"".join(encode_event(i, "lick") for i in range(lines)))
    first = subprocess.Popen(recorder.args(f"file:{log}"), stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    err = kit.StderrLines(first)
    try:
        kit.wait_for(lambda: counts(kit, recorder.db, lines)[0] == lines, 120, "the first recorder stores the file")
        # the window's rig list or a script pointed at the same log (here through a symlink) and database
        (tmp_path / "link.rsw").symlink_to(log)
        second = subprocess.run(recorder.args(f"file:{tmp_path / 'link.rsw'}", "box2", "--seconds", "2"),
                                capture_output=True, text=True, timeout=60)
        first.send_signal(signal.SIGKILL)  # a crash: its lock stays behind
        first.wait(30)
        third = subprocess.run(recorder.args(f"file:{log}", "box1", "--seconds", "1"), capture_output=True,
                               text=True, timeout=60)
    finally:
        if first.poll() is None:
            first.kill()
    stored, lost, dup = counts(kit, recorder.db, lines)
    print(f"\none recorder per source: {lines} lines sent, {stored} stored, lost {lost}, duplicated {dup}; "
          f"second recorder exit {second.returncode}; after SIGKILL of the holder, the next exit {third.returncode}")
    assert second.returncode == 2 and len(second.stderr.strip().splitlines()) == 1, second.stderr
    assert "rigside record" in second.stderr and f"process {first.pid}" in second.stderr
    assert third.returncode == 0 and "took over the lock" in third.stderr and "process has ended" in third.stderr
    assert lost == 0 and dup == 0 and stored == lines
    assert err.text.count("Traceback") == 0


@pytest.mark.skipif(os.name != "posix", reason="pseudo-terminals are POSIX")
@pytest.mark.parametrize("replugs", [pytest.param(5, id="short"),
                                     pytest.param(50, id="long", marks=[pytest.mark.long, pytest.mark.timeout(900)])])
def test_a_board_without_header_loses_nothing_over_quick_replugs(serial_run, kit, replugs):
    # a native-USB board that does not reset: no header, and re-plugged faster than the 3 s header wait
    run = serial_run(wait_for_header=True)
    writer, source = run.writer, run.source
    source.start()
    sent = 0
    try:
        for cycle in range(replugs):
            sent += 120
            run.replug_cycle(cycle, b"".join(encode_event(sent - 120 + i, "lick") for i in range(120)), sent)
    finally:
        source.stop()
    assert writer.stop(timeout=30), writer.status().text
    stored, lost, dup = counts(kit, writer.path, sent)
    segments = kit.query(writer.path, "SELECT count(DISTINCT segment) FROM events")[0][0]
    print(f"\nheaderless board: {replugs} quick re-plugs, {sent} events sent, {stored} stored, lost {lost}, "
          f"duplicated {dup}, clock segments {segments}")
    assert lost == 0 and dup == 0 and segments == replugs  # each reconnect starts its own clock segment


@pytest.mark.parametrize("lines", [pytest.param(2_000, id="short"),
                                   pytest.param(50_000, id="long", marks=[pytest.mark.long, pytest.mark.timeout(900)])])
@pytest.mark.slow  # record and import in child processes
def test_a_crafted_clock_is_malformed_lines_and_record_and_import_store_the_rest(tmp_path, recorder, kit, lines):
    step = (1 << 61) - 1  # just under half a 62-bit period: each line pushes the unwrapped time forward
    crafted = encode_header(wrap=62) + b"".join(b"%d lick\n" % ((i * step) % (1 << 62)) for i in range(8))
    normal = encode_header() + b"".join(encode_event(i, "lever_down") for i in range(lines))
    log = tmp_path / "heron_s01.rsw"
    log.write_bytes(crafted + normal + b"9 reward 3e6\n")
    recorded = subprocess.run(recorder.args(f"file:{log}", "box1", "--seconds", "2"), capture_output=True,
                              text=True, timeout=120)
    stored, lost, dup = counts(kit, recorder.db, lines, "SELECT raw_time FROM events WHERE code = "
                                                      "(SELECT code FROM event_codes WHERE name = 'lever_down')")
    malformed = kit.query(recorder.db, "SELECT count(*) FROM raw_lines WHERE kind = 'malformed'")[0][0]
    imported = subprocess.run([sys.executable, "-m", "monitor.app", "import", str(log), "--protocol",
                               str(recorder.protocol), "--db", str(tmp_path / "imported.sqlite3"), "--no-fit"],
                              capture_output=True, text=True, timeout=120)
    print(f"\ncrafted clock: {lines} good lines sent, {stored} stored, lost {lost}, duplicated {dup}, "
          f"{malformed} lines kept as malformed; record exit {recorded.returncode}, import exit {imported.returncode}")
    assert recorded.returncode == 0 and "Traceback" not in recorded.stderr, recorded.stderr
    assert imported.returncode == 0 and "Traceback" not in imported.stderr, imported.stderr
    assert lost == 0 and dup == 0 and malformed >= 2  # the clock overflows and the 3e6 uL reward


@pytest.mark.slow
def test_a_source_that_never_opens_fails_and_keeps_no_session(recorder, kit):
    typo = subprocess.run(recorder.args("serial:/dev/rigside-typo", "box1", "--seconds", "1"),
                          capture_output=True, text=True, timeout=60)
    print(f"\ntypo source: exit {typo.returncode}, sessions kept "
          f"{kit.query(recorder.db, 'SELECT count(*) FROM sessions')}")
    assert typo.returncode == 1 and "never opened" in typo.stderr and "Traceback" not in typo.stderr
    assert kit.query(recorder.db, "SELECT count(*) FROM sessions") == [(0,)]
    unknown = subprocess.run([a for a in recorder.args("serial:/dev/rigside-typo", "box9", "--seconds", "1")
                              if a != "--new-animal"], capture_output=True, text=True, timeout=60)
    assert unknown.returncode == 2 and "--new-animal" in unknown.stderr
