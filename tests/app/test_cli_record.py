"""`rigside record` and `rigside export events` as subprocesses: resume, SIGKILL, serial unplug, CSV, errors."""

from __future__ import annotations

import csv
import os
import signal
import sqlite3
import subprocess
import sys
import threading
import time
from pathlib import Path

import pytest

from drivers.wire import encode_event, encode_header
from fixtures.devices import StderrLines, point_link
from fixtures.devices import run_child as cli
from fixtures.protocols import protocol_toml
from fixtures.sessions import wait_for

pytestmark = pytest.mark.slow  # windows, subprocesses or simulated histories: seconds per test

PROTOCOL = protocol_toml(version=3, plateau_sessions=3)


def record_args(tmp_path: Path, source: str, *extra: str) -> list[str]:
    protocol = tmp_path / "p.toml"
    protocol.write_text(PROTOCOL)
    return ["record", "--source", source, "--rig", "box1", "--animal", "heron", "--new-animal",
            "--protocol", str(protocol), "--db", str(tmp_path / "store.sqlite3"), *extra]


def stored_times(db: Path) -> list[int]:
    if not db.exists():
        return []
    conn = sqlite3.connect(f"file:{db}?mode=ro", uri=True, timeout=5)
    try:
        return [r[0] for r in conn.execute("SELECT raw_time FROM events ORDER BY rowid")]
    except sqlite3.OperationalError:
        return []  # not created yet
    finally:
        conn.close()


def event_line(i: int) -> bytes:
    return encode_event(i, ("lever_down", "lever_up", "lick")[i % 3])


def test_file_existing_before_start_is_read_from_0_then_resumed(tmp_path):
    log = tmp_path / "box1.rsw"
    log.write_bytes(encode_header(fw="t") + b"".join(event_line(i) for i in range(100)) + b"100 lev")
    first = cli(*record_args(tmp_path, f"file:{log}", "--seconds", "0.5"))
    assert first.returncode == 0, first.stderr
    assert "byte 0" in first.stderr
    assert stored_times(tmp_path / "store.sqlite3") == list(range(100))
    with open(log, "ab") as fh:
        fh.write(b"er_up\n" + b"".join(event_line(i) for i in range(101, 150)))
    second = cli(*record_args(tmp_path, f"file:{log}", "--seconds", "0.5"))
    assert second.returncode == 0, second.stderr
    assert "resuming at byte" in second.stderr
    assert stored_times(tmp_path / "store.sqlite3") == list(range(150))


def test_sigkill_while_the_file_grows_stores_every_line_exactly_once(tmp_path):
    log = tmp_path / "grow.rsw"
    log.write_bytes(encode_header())
    total = 6000
    done = threading.Event()

    def grow() -> None:  # acquisition code appending odd-sized pieces
        data = b"".join(event_line(i) for i in range(total))
        at, step = 0, 0
        while at < len(data):
            step = step % 977 + 131
            with open(log, "ab") as fh:
                fh.write(data[at:at + step])
            at += step
            time.sleep(0.015)  # pacing of the simulated writer (~2 s in all), not synchronisation
        done.set()

    writer = threading.Thread(target=grow, daemon=True)
    writer.start()
    db = tmp_path / "store.sqlite3"
    args = [sys.executable, "-m", "monitor.app", *record_args(tmp_path, f"file:{log}")]
    kills = 0
    while not done.is_set() or kills < 3:
        before = len(stored_times(db))
        proc = subprocess.Popen(args, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        wait_for(lambda: len(stored_times(db)) > before or (done.is_set() and before >= total),
                 what="progress before the kill")
        proc.send_signal(signal.SIGKILL)
        proc.wait(10)
        kills += 1
        if kills > 40:
            break
    writer.join(30)
    growing_kills = kills
    print(f"SIGKILLed {kills} recorders while the file grew")
    final = cli(*record_args(tmp_path, f"file:{log}", "--seconds", "1"))
    assert final.returncode == 0, final.stderr
    assert growing_kills >= 3
    assert stored_times(db) == list(range(total))  # every line once, in order


@pytest.mark.skipif(os.name != "posix", reason="pseudo-terminals are POSIX")
def test_record_serial_symlink_survives_an_unplug_and_stops_cleanly_on_sigterm(tmp_path, boards):
    link = tmp_path / "rig-by-id"
    first = boards()
    os.symlink(first.name, link)
    db = tmp_path / "store.sqlite3"
    proc = subprocess.Popen([sys.executable, "-m", "monitor.app", *record_args(tmp_path, f"serial:{link}")],
                            stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    stderr = StderrLines(proc)
    try:
        # "connected" is printed after open() returned, i.e. after pyserial flushed the input
        wait_for(lambda: stderr.has("record: connected"), what="recorder opened the port")
        first.write(encode_header(fw="a") + b"".join(event_line(i) for i in range(10)))
        wait_for(lambda: len(stored_times(db)) == 10, what="first events stored")
        second = boards()
        first.unplug()
        point_link(link, second.name)
        wait_for(lambda: stderr.has("reconnected after"), what="reopened by the symlink")
        second.write(encode_header(fw="a") + b"".join(event_line(i) for i in range(10, 20)))
        wait_for(lambda: len(stored_times(db)) == 20, what="events after re-plug")
    finally:
        proc.send_signal(signal.SIGTERM)
        proc.wait(20)
    err = stderr.text
    assert proc.returncode == 0, err
    assert stored_times(db) == list(range(20))
    conn = sqlite3.connect(db)
    gaps = conn.execute("SELECT start_at < end_at, reason FROM gaps").fetchall()
    ended = conn.execute("SELECT ended_at IS NOT NULL FROM sessions").fetchall()
    conn.close()
    assert len(gaps) == 1 and gaps[0][0] == 1 and "unplugged" in gaps[0][1]
    assert ended == [(1,)]
    assert "unplugged" in err


def test_record_imports_neither_qt_nor_scipy(tmp_path):
    log = tmp_path / "box.rsw"
    log.write_bytes(event_line(1))
    code = ("import sys; from monitor.app.cli import main; rc = main(sys.argv[1:]); "
            "print(sorted({m.split('.')[0] for m in sys.modules} & {'PySide6', 'shiboken6', 'pyqtgraph', 'scipy'})); "
            "sys.exit(rc)")
    result = subprocess.run([sys.executable, "-c", code, *record_args(tmp_path, f"file:{log}", "--seconds", "0.3")],
                            capture_output=True, text=True, timeout=60)
    assert result.returncode == 0, result.stderr
    assert result.stdout.strip().splitlines()[-1] == "[]"


def test_export_events_csv_has_the_contract_columns_and_escapes_formulas(tmp_path):
    log = tmp_path / "box.rsw"
    log.write_bytes(encode_header() + encode_event(5, "note", "=HYPERLINK(x)") + encode_event(6, "param", "offset", "-20")
                    + encode_event(7, "outcome", "@risk") + encode_event(8, "reward", 30))
    assert cli(*record_args(tmp_path, f"file:{log}", "--seconds", "0.3")).returncode == 0
    out = tmp_path / "events.csv"
    result = cli("export", "events", "--db", str(tmp_path / "store.sqlite3"), "--csv", str(out))
    assert result.returncode == 0, result.stderr
    with open(out, newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert {"animal", "session", "device_time", "event", "value"} <= set(rows[0])
    assert [(r["animal"], r["device_time"], r["event"], r["value"]) for r in rows] == [
        ("heron", "5", "note", "'=HYPERLINK(x)"),
        ("heron", "6", "param", "offset -20"),
        ("heron", "7", "outcome", "'@risk"),
        ("heron", "8", "reward", "30"),
    ]


@pytest.mark.parametrize("args, names", [
    (["export", "trials", "--csv", "x.csv"], "--db"),
    (["export", "--nwb", "outdir"], "--db"),
    (["export", "events"], "--csv"),
])
def test_export_with_a_missing_database_or_incomplete_arguments_is_a_one_line_usage_error(tmp_path, args, names):
    result = cli(*args, "--db", str(tmp_path / "none.sqlite3"))
    assert result.returncode == 2
    assert len(result.stderr.strip().splitlines()) == 1 and names in result.stderr


def test_bad_record_input_is_one_line_and_exit_2(tmp_path):
    corrupt = tmp_path / "store.sqlite3"
    corrupt.write_bytes(b"garbage" * 500)
    for source, expect in (("tcp:/dev/x", "--source"), (f"file:{tmp_path / 'a.rsw'}", "--db")):
        result = cli(*record_args(tmp_path, source, "--seconds", "0.2"))
        assert result.returncode == 2, result.stderr
        assert len(result.stderr.strip().splitlines()) == 1 and expect in result.stderr
    assert corrupt.read_bytes() == b"garbage" * 500
    bad_protocol = tmp_path / "bad.toml"
    bad_protocol.write_text("[protocol]\nname = 'x'\n")
    args = record_args(tmp_path, f"file:{tmp_path / 'a.rsw'}")
    args[args.index("--protocol") + 1] = str(bad_protocol)
    result = cli(*args)
    assert result.returncode == 2 and "--protocol" in result.stderr and len(result.stderr.strip().splitlines()) == 1


def test_a_log_file_recorded_live_is_not_imported_a_second_time(tmp_path):
    """A box's log recorded live by `rigside record`, then imported with the day's files: its events would be
    stored twice. The import refuses it (or skips it with --skip-imported), copies included, and says how
    to take up what the recording did not reach."""
    log = tmp_path / "box1.rsw"
    log.write_bytes(encode_header(fw="t") + b"".join(event_line(i) for i in range(200)))
    assert cli(*record_args(tmp_path, f"file:{log}", "--seconds", "0.5")).returncode == 0
    db = tmp_path / "store.sqlite3"
    before = len(stored_times(db))
    assert before == 200
    protocol = tmp_path / "p.toml"
    refused = cli("import", str(log), "--animal", "heron", "--protocol", str(protocol), "--db", str(db), "--no-fit")
    assert refused.returncode == 2 and "recorded live from file:" in refused.stderr
    assert "store those events twice" in refused.stderr and "takes up the rest" not in refused.stderr

    copy = tmp_path / "copied" / "box1.rsw"   # the same log copied elsewhere, and grown by a few lines meanwhile
    copy.parent.mkdir()
    copy.write_bytes(log.read_bytes() + b"".join(event_line(i) for i in range(200, 210)))
    other = tmp_path / "other.rsw"
    other.write_bytes(encode_header(fw="t") + b"".join(event_line(i) for i in range(50)))
    done = cli("import", str(copy), str(other), "--animal", "heron", "--protocol", str(protocol), "--db", str(db),
               "--no-fit", "--skip-imported", "--quiet")
    assert done.returncode == 0, done.stderr
    assert f"skipped {copy}: recorded live from file:{log}" in done.stderr and "takes up the rest" in done.stderr
    assert len(stored_times(db)) == before + 50   # the other file only


def test_a_log_file_imported_while_written_is_recorded_live_after_the_imported_bytes(tmp_path):
    """A box's log imported with the day's files while the rig still wrote it (its last line unfinished), then
    recorded live: the recording goes on after the imported bytes (the unfinished line, which the import
    kept as malformed, is read again whole), so every event is stored once, and a restart resumes as usual."""
    log = tmp_path / "box1.rsw"
    log.write_bytes(encode_header(fw="t") + b"".join(event_line(i) for i in range(100)) + b"100 lev")
    db, protocol = tmp_path / "store.sqlite3", tmp_path / "p.toml"
    protocol.write_text(PROTOCOL)
    imported = cli("import", str(log), "--animal", "heron", "--protocol", str(protocol), "--db", str(db),
                   "--no-fit", "--quiet")
    assert imported.returncode == 0, imported.stderr
    assert stored_times(db) == list(range(100))
    with open(log, "ab") as fh:
        fh.write(b"er_up\n" + b"".join(event_line(i) for i in range(101, 150)))
    live = cli(*record_args(tmp_path, f"file:{log}", "--seconds", "0.5"))
    assert live.returncode == 0, live.stderr
    assert "box1.rsw: its first" in live.stderr and "100 events) were imported" in live.stderr
    assert stored_times(db) == list(range(150))
    with open(log, "ab") as fh:
        fh.write(b"".join(event_line(i) for i in range(150, 160)))
    again = cli(*record_args(tmp_path, f"file:{log}", "--seconds", "0.5"))
    assert again.returncode == 0 and "resuming at byte" in again.stderr, again.stderr
    assert stored_times(db) == list(range(160))
    conn = sqlite3.connect(db)
    try:   # the notice is kept with the live session, and nothing was excluded
        notices = [r[0] for r in conn.execute("SELECT reason FROM raw_lines WHERE kind = 'notice'")]
        assert any("were imported at" in n for n in notices), notices
        assert conn.execute("SELECT COUNT(*) FROM sessions WHERE excluded = 1").fetchone()[0] == 0
    finally:
        conn.close()


def test_a_log_file_a_recorder_follows_now_is_skipped_by_an_import_with_a_clear_line(tmp_path):
    """The day's folder imported while `rigside record` follows one of its logs (nothing stored from it yet):
    refused, or skipped with --skip-imported, naming the recorder; the other files are imported."""
    log, other = tmp_path / "box1.rsw", tmp_path / "box2.rsw"
    log.write_bytes(b"")
    other.write_bytes(encode_header(fw="t") + b"".join(event_line(i) for i in range(30)))
    db, protocol = tmp_path / "store.sqlite3", tmp_path / "p.toml"
    recorder = subprocess.Popen([sys.executable, "-m", "monitor.app", *record_args(tmp_path, f"file:{log}")],
                                stderr=subprocess.PIPE, text=True)
    try:
        lines = StderrLines(recorder)
        wait_for(lambda: lines.has("never read before"), timeout=30)
        common = ("--animal", "heron", "--protocol", str(protocol), "--db", str(db), "--no-fit")
        refused = cli("import", str(log), str(other), *common)
        assert refused.returncode == 2 and "is being recorded into this database by rigside record" in refused.stderr
        assert "store its events twice" in refused.stderr and stored_times(db) == []
        done = cli("import", str(log), str(other), *common, "--skip-imported", "--quiet")
        assert done.returncode == 0, done.stderr
        assert f"skipped {log}: " in done.stderr and stored_times(db) == list(range(30))
    finally:
        recorder.send_signal(signal.SIGTERM)
        recorder.wait(timeout=30)


def test_a_grown_copy_whose_line_endings_changed_supersedes_the_import_made_while_written(tmp_path):
    """A log imported while its rig still wrote it, then the finished log copied through a text-mode transfer
    (CRLF, another folder): other bytes, so not found by its bytes, but its session holds the imported one grown.
    The earlier session is excluded as superseded (kept, flagged), so every event counts once; the same copy
    cut short instead is refused as stored already."""
    whole = encode_header(fw="t", start="2026-03-02T09:00:00+00:00") + b"".join(event_line(i) for i in range(300))
    log = tmp_path / "box1.rsw"
    log.write_bytes(whole[: whole.index(event_line(120))])
    db, protocol = tmp_path / "store.sqlite3", tmp_path / "p.toml"
    protocol.write_text(PROTOCOL)
    common = ("--animal", "heron", "--protocol", str(protocol), "--db", str(db), "--no-fit", "--quiet")
    assert cli("import", str(log), *common).returncode == 0
    copies = tmp_path / "copied"
    copies.mkdir()
    (copies / "box1.rsw").write_bytes(whole[: whole.index(event_line(60))].replace(b"\n", b"\r\n"))
    cut = cli("import", str(copies / "box1.rsw"), *common)
    assert cut.returncode == 2 and "stored already from other bytes" in cut.stderr
    (copies / "box1.rsw").write_bytes(whole.replace(b"\n", b"\r\n"))
    grown = cli("import", str(copies / "box1.rsw"), *common)
    assert grown.returncode == 0, grown.stderr
    assert "1 earlier session of it now excluded as superseded" in grown.stderr
    conn = sqlite3.connect(db)
    try:   # plain sqlite3: the events of the sessions that count
        counted = [r[0] for r in conn.execute("SELECT e.raw_time FROM events e JOIN sessions s "
                                              "ON s.id = e.session_id WHERE s.excluded = 0 ORDER BY e.rowid")]
        assert conn.execute("SELECT count(*) FROM sessions WHERE excluded = 1").fetchone()[0] == 1
    finally:
        conn.close()
    assert counted == list(range(300))
