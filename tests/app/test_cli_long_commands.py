"""Long commands: a bar on a terminal, nothing with --quiet or in a pipe, a summary line, and a clean Ctrl-C.

Ctrl-C is a real SIGINT sent to a subprocess while it works; it must exit 130 (128 + SIGINT, the shell's
convention, common practice), name what it finished and leave no partial file or half-stored rows.
"""

from __future__ import annotations

import io
import os
import signal
import sqlite3
import subprocess
import sys
import time
from pathlib import Path

import pytest

from drivers.wire import encode_event, encode_header
from mock_rig.history import cohort, write_history
from monitor.app.cli import main

SIGINT_EXIT = 130  # 128 + SIGINT (2): how shells report a command stopped by Ctrl-C (common practice)
posix_signal = pytest.mark.skipif(sys.platform == "win32", reason="sends a POSIX SIGINT to a subprocess")


class Terminal(io.StringIO):
    def isatty(self) -> bool:
        return True


@pytest.fixture(scope="module")
def cohort_store(tmp_path_factory) -> tuple[Path, Path]:
    """Two animals, 16 days (24 sessions, about 120,000 events): long enough to interrupt mid-run."""
    out = tmp_path_factory.mktemp("cohort")
    write_history(out, cohort(2, seed=5), days=16)
    db = out / "store.sqlite3"
    for name in ("alder", "birch"):
        assert main(["import", *map(str, sorted(out.glob(f"{name}_s*.rsw"))), "--protocol",
                     str(out / f"{name}.protocol.toml"), "--db", str(db), "--no-fit", "--quiet"]) == 0
    return out, db


def count(db: Path, table: str) -> int:
    with sqlite3.connect(db) as conn:     # plain sqlite3, not the store's code
        return conn.execute(f"SELECT count(*) FROM {table}").fetchone()[0]


def run(capsys, monkeypatch, stderr: io.StringIO, *args) -> tuple[int, str, str]:
    monkeypatch.setattr(sys, "stderr", stderr)
    code = main([str(a) for a in args])
    return code, capsys.readouterr().out, stderr.getvalue()


def rigside(*args, own_group: bool = False) -> subprocess.Popen:
    """The command in a child process; with `own_group` in a process group of its own, as a terminal starts a
    command (a terminal's Ctrl-C reaches every process of the group: the command's worker processes too)."""
    return subprocess.Popen([sys.executable, "-m", "monitor.app", *map(str, args)], stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True, env={**os.environ, "PYTHONUNBUFFERED": "1"},
                            start_new_session=own_group)


def interrupt_after_line(process: subprocess.Popen, start: str,
                         whole_group: bool = False) -> tuple[list[str], str, str]:
    """SIGINT (to the process, or to its whole group as a terminal's Ctrl-C) as soon as a stderr line starting
    with `start` appears; the lines read before, out and err."""
    seen = []
    while True:
        line = process.stderr.readline()
        assert line, f"the command ended before a line starting {start!r}: {seen}"
        seen.append(line)
        if line.startswith(start):
            break
    if whole_group:
        os.killpg(process.pid, signal.SIGINT)
    else:
        process.send_signal(signal.SIGINT)
    err = process.stderr.read()  # through the same reader: lines it has buffered already are kept
    out = process.stdout.read()
    process.wait(timeout=120)
    return seen, out, err


def interrupt_when(process: subprocess.Popen, ready) -> tuple[str, str]:
    deadline = time.monotonic() + 120
    while not ready():
        assert process.poll() is None, "the command ended before it could be interrupted"
        assert time.monotonic() < deadline
        time.sleep(0.005)
    process.send_signal(signal.SIGINT)
    return process.communicate(timeout=120)


@pytest.mark.parametrize("what,table", [("events", "events"), ("trials", "trials")])
def test_csv_export_bar_on_a_terminal_summary_line_and_quiet(cohort_store, tmp_path, capsys, monkeypatch, what, table):
    _, db = cohort_store
    code, out, err = run(capsys, monkeypatch, Terminal(), "export", what, "--db", db, "--csv", tmp_path / "a.csv")
    rows = count(db, table)
    assert code == 0 and f"exporting {what}" in err and "row" in err
    assert out.startswith(f"exported {rows} {what} to ") and out.rstrip().endswith(" s")
    with open(tmp_path / "a.csv", encoding="utf-8") as fh:
        assert sum(1 for _ in fh) == rows + 1          # header + one line per row
    assert run(capsys, monkeypatch, Terminal(), "export", what, "--db", db, "--csv", tmp_path / "b.csv",
               "--quiet")[2] == ""
    assert run(capsys, monkeypatch, io.StringIO(), "export", what, "--db", db, "--csv", tmp_path / "c.csv")[2] == ""
    assert (tmp_path / "a.csv").read_bytes() == (tmp_path / "b.csv").read_bytes() == (tmp_path / "c.csv").read_bytes()


def test_import_bar_on_a_terminal_and_not_with_quiet(cohort_store, tmp_path, capsys, monkeypatch):
    history, _ = cohort_store
    files = sorted(history.glob("alder_s*.rsw"))[:3]
    args = ["import", *files, "--protocol", history / "alder.protocol.toml", "--no-fit"]
    code, out, err = run(capsys, monkeypatch, Terminal(), *args, "--db", tmp_path / "a.sqlite3")
    assert code == 0 and "importing" in err and "3/3" in err and out.startswith("imported 3 files: 3 sessions")
    code, out, err = run(capsys, monkeypatch, Terminal(), *args, "--db", tmp_path / "b.sqlite3", "--quiet")
    assert code == 0 and "importing:" not in err and "it/s" not in err and "file/s" not in err


@posix_signal
def test_ctrl_c_stops_a_csv_export_with_no_partial_file(cohort_store, tmp_path):
    _, db = cohort_store
    target = tmp_path / "events.csv"
    target.write_text("the earlier export\n")
    process = rigside("export", "events", "--db", db, "--csv", target)
    out, err = interrupt_when(process, lambda: any(tmp_path.glob(".events.csv.*.part")))
    assert process.returncode == SIGINT_EXIT, err
    assert "interrupted" in err and f"nothing was written under {target}" in err
    assert target.read_text() == "the earlier export\n" and sorted(p.name for p in tmp_path.iterdir()) == ["events.csv"]


@posix_signal
def test_ctrl_c_stops_an_import_between_files_and_names_them(cohort_store, tmp_path):
    history, _ = cohort_store
    files = sorted(history.glob("birch_s*.rsw"))
    db = tmp_path / "store.sqlite3"
    process = rigside("import", *files, "--protocol", history / "birch.protocol.toml", "--db", db, "--no-fit",
                      "--jobs", "1")
    seen, out, err = interrupt_after_line(process, "[1/")
    assert process.returncode == SIGINT_EXIT, err
    lines = [line for line in seen + err.splitlines(keepends=True) if line.startswith("[")]
    assert 1 <= len(lines) < len(files)
    assert f"interrupted: {len(lines)} of {len(files)} files imported" in err
    assert count(db, "sessions") == len(lines)       # whole files only, as many as were named
    assert main(["import", *map(str, files), "--protocol", str(history / "birch.protocol.toml"), "--db", str(db),
                 "--no-fit", "--skip-imported", "--quiet"]) == 0
    assert count(db, "sessions") == len(files)


@posix_signal
@pytest.mark.slow
def test_ctrl_c_stops_an_nwb_export_between_files(cohort_store, tmp_path):
    pytest.importorskip("pynwb")
    _, db = cohort_store
    folder = tmp_path / "nwb"
    process = rigside("export", "--db", db, "--nwb", folder)
    seen, out, err = interrupt_after_line(process, "[1/")
    assert process.returncode == SIGINT_EXIT, err
    named = [line for line in seen + err.splitlines(keepends=True) if line.startswith("[")]
    files = sorted(p.name for p in folder.iterdir())
    assert len(files) == len(named) < count(db, "sessions")
    assert all(name.endswith("_behavior.nwb") and not name.startswith(".") for name in files)
    assert f"interrupted: {len(files)} of {count(db, 'sessions')} sessions exported" in err


@posix_signal
def test_ctrl_c_stops_mock_rig_history_with_whole_files_and_no_truth(tmp_path):
    out_dir = tmp_path / "history"
    process = subprocess.Popen([sys.executable, "-m", "mock_rig", "history", "--animals", "8", "--days", "30",
                                "--out", str(out_dir)], stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    out, err = interrupt_when(process, lambda: any(out_dir.glob("*_s*.rsw")))
    assert process.returncode == SIGINT_EXIT, err
    sessions = sorted(out_dir.glob("*_s*.rsw"))
    assert f"interrupted: wrote {len(sessions)} of 176 session files" in err   # 8 animals x 22 weekdays in 30 days
    assert not (out_dir / "truth.json").exists() and not any(p.name.endswith(".part") for p in out_dir.iterdir())
    for path in sessions:   # each whole: it ends with the box's session_end line (docs/mock_rig.md)
        assert path.read_text().rstrip("\n").endswith("session_end")


def test_mock_rig_history_bar_on_a_terminal_only(tmp_path, monkeypatch, capsys):
    from mock_rig.__main__ import main as mock_main

    monkeypatch.setattr(sys, "stderr", Terminal())
    assert mock_main(["history", "--animals", "1", "--days", "3", "--out", str(tmp_path / "a")]) == 0
    assert "writing history" in sys.stderr.getvalue() and "session" in sys.stderr.getvalue()
    monkeypatch.setattr(sys, "stderr", Terminal())
    assert mock_main(["history", "--animals", "1", "--days", "3", "--out", str(tmp_path / "b"), "--quiet"]) == 0
    assert sys.stderr.getvalue() == "" and capsys.readouterr().out.startswith("wrote 3 sessions of 1 animals")


@posix_signal
@pytest.mark.slow
def test_ctrl_c_stops_a_sync_after_a_committed_chunk_and_the_next_sync_sends_the_rest(cohort_store, lab_url,
                                                                                      tmp_path):
    import psycopg

    _, db = cohort_store
    local = tmp_path / "pc.sqlite3"
    local.write_bytes(db.read_bytes())
    assert main(["lab", "init", "--lab", lab_url]) == 0
    process = rigside("sync", "--db", local, "--lab", lab_url, "--pc-name", "room-a", "--chunk-rows", "2000",
                      "--progress")
    seen, out, err = interrupt_after_line(process, "events: up to row")
    assert process.returncode == SIGINT_EXIT, err
    assert "interrupted: sent and committed events up to row" in err and "the next `rigside sync`" in err
    with psycopg.connect(lab_url) as pg:        # the server's own count
        partial = pg.execute("SELECT count(*) FROM events").fetchone()[0]
    assert 0 < partial < count(local, "events") and partial % 2000 == 0     # whole chunks only
    assert main(["sync", "--db", str(local), "--lab", lab_url, "--quiet"]) == 0
    with psycopg.connect(lab_url) as pg:
        assert pg.execute("SELECT count(*) FROM events").fetchone()[0] == count(local, "events")


@posix_signal
@pytest.mark.slow
def test_ctrl_c_while_fitting_keeps_every_imported_file(cohort_store, tmp_path):
    history, _ = cohort_store
    files = sorted(history.glob("alder_s*.rsw"))
    db = tmp_path / "store.sqlite3"
    process = rigside("import", *files, "--protocol", history / "alder.protocol.toml", "--db", db, own_group=True)
    seen, out, err = interrupt_after_line(process, "fitting the consolidation model", whole_group=True)
    assert process.returncode == SIGINT_EXIT, err
    assert out.startswith(f"imported {len(files)} files") and "interrupted while fitting: 0 of 1 animals fitted" in err
    assert "Traceback" not in err and "KeyboardInterrupt" not in err   # the fit's process left Ctrl-C to the command
    assert count(db, "sessions") == len(files)
    assert count(db, "fits") == 0 and "the same command with --skip-imported fits the others" in err

    # the command the message names: every file is skipped, and the animal whose fit was stopped is fitted
    again = rigside("import", *files, "--protocol", history / "alder.protocol.toml", "--db", db, "--skip-imported",
                    "--quiet")
    out, err = again.communicate(timeout=300)
    assert again.returncode == 0, err
    assert out.startswith("imported 0 files") and "fit alder: slow-state fraction" in err
    assert count(db, "fits") == 1 and count(db, "sessions") == len(files)
    # once the fit is current, the same command fits nothing more
    third = rigside("import", *files, "--protocol", history / "alder.protocol.toml", "--db", db, "--skip-imported",
                    "--quiet")
    out, err = third.communicate(timeout=120)
    assert third.returncode == 0 and "fitting" not in err and count(db, "fits") == 1


def in_session(session: int) -> list[int]:
    """Processes of a session, from /proc (Linux): field 6 of /proc/PID/stat, the session id (proc(5), the Linux
    man page), counted after the command's name in parentheses."""
    found = []
    for entry in Path("/proc").iterdir():
        try:
            stat = (entry / "stat").read_text()
        except (OSError, ValueError):
            continue
        if entry.name.isdigit() and int(stat.rpartition(")")[2].split()[3]) == session:
            found.append(int(entry.name))
    return found


def killed(process: subprocess.Popen) -> list[int]:
    """SIGKILL the command (started in a session of its own); the processes of its session still there 15 s
    later, each then killed too."""
    process.kill()
    process.wait(timeout=10)
    deadline = time.monotonic() + 15
    while in_session(process.pid) and time.monotonic() < deadline:
        time.sleep(0.1)
    left = in_session(process.pid)
    for pid in left:
        os.kill(pid, signal.SIGKILL)
    return left


@pytest.mark.skipif(not Path("/proc/self/stat").exists(), reason="finds the command's processes in /proc (Linux)")
@pytest.mark.slow
def test_killing_an_import_while_fitting_leaves_no_process_behind(cohort_store, tmp_path):
    """SIGKILL (the OS, a task manager): no handler runs, yet the fits' and parsers' processes end too."""
    history, _ = cohort_store
    files = sorted(history.glob("alder_s*.rsw"))
    db = tmp_path / "store.sqlite3"
    process = rigside("import", *files, "--protocol", history / "alder.protocol.toml", "--db", db, own_group=True)
    while not process.stderr.readline().startswith("fitting the consolidation model"):
        assert process.poll() is None, "the import ended before its fits"
    workers = [pid for pid in in_session(process.pid) if pid != process.pid]
    assert workers, "the fit runs in a process of its own"
    left = killed(process)
    assert not left, f"processes outlived the killed import: {left}"
    assert count(db, "sessions") == len(files)
    with sqlite3.connect(db) as conn:
        assert conn.execute("PRAGMA integrity_check").fetchone()[0] == "ok"


@pytest.mark.skipif(not Path("/proc/self/stat").exists(), reason="finds the command's processes in /proc (Linux)")
@pytest.mark.slow
def test_killing_an_import_while_its_workers_store_files_leaves_whole_files_and_resumes(cohort_store, tmp_path):
    """SIGKILL while two workers store files side by side: no process left behind, an intact database,
    every stored file whole (SQLite rolls back a transaction cut short: "Atomic Commit In SQLite",
    sqlite.org/atomiccommit.html), and --skip-imported completes it to the rows of an import never killed."""
    history, _ = cohort_store
    files = sorted(history.glob("alder_s*.rsw"))
    db, whole_db = tmp_path / "store.sqlite3", tmp_path / "whole.sqlite3"
    process = rigside("import", *files, "--protocol", history / "alder.protocol.toml", "--db", db, "--no-fit",
                      "--jobs", "2", own_group=True)
    while not process.stderr.readline().startswith("[2/"):
        assert process.poll() is None, "the import ended before its second file"
    left = killed(process)
    assert not left, f"worker processes outlived the killed import: {left}"
    with sqlite3.connect(db) as conn:  # plain sqlite3, not the store's code
        assert conn.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
        stored = conn.execute("SELECT i.events, (SELECT count(*) FROM events AS e JOIN sessions AS s ON "
                              "s.id = e.session_id WHERE s.import_id = i.id) FROM imports AS i").fetchall()
    assert 2 <= len(stored) <= len(files) and all(counted == held for counted, held in stored)
    for target, again in ((db, ["--skip-imported"]), (whole_db, [])):
        assert main(["import", *map(str, files), "--protocol", str(history / "alder.protocol.toml"), "--db",
                     str(target), "--no-fit", "--quiet", *again]) == 0
    for table in ("imports", "sessions", "events", "trials", "raw_lines"):
        assert count(db, table) == count(whole_db, table), table


@pytest.mark.skipif(not hasattr(os, "openpty"), reason="needs a pseudo-terminal (POSIX)")
def test_a_real_terminal_that_states_no_size_still_gets_the_bar(cohort_store, tmp_path):
    _, db = cohort_store
    main_fd, terminal = os.openpty()     # a new pseudo-terminal states 0 x 0 until someone sets its size
    assert os.get_terminal_size(terminal) == os.terminal_size((0, 0))
    process = subprocess.Popen([sys.executable, "-m", "monitor.app", "export", "trials", "--db", str(db), "--csv",
                                str(tmp_path / "t.csv")], stdout=subprocess.PIPE, stderr=terminal)
    os.close(terminal)
    drawn = b""
    while True:
        try:
            chunk = os.read(main_fd, 65536)
        except OSError:   # the terminal closed when the command ended (Linux: EIO)
            break
        if not chunk:
            break
        drawn += chunk
    os.close(main_fd)
    assert process.wait(timeout=120) == 0
    assert b"exporting trials" in drawn and b"row/s" in drawn


def test_copies_whose_line_endings_changed_are_skipped_by_the_storing_workers(cohort_store, tmp_path, capsys,
                                                                              monkeypatch):
    """An animal's files copied again after a text-mode transfer (CRLF), beside one new file: the workers
    that store files side by side (--jobs 2, over 1 MB) skip the copies, naming each, and store the new one;
    without --skip-imported nothing of the copies goes in."""
    import shutil

    history, stored = cohort_store
    db = tmp_path / "store.sqlite3"
    shutil.copy(stored, db)
    copies = tmp_path / "copied"
    copies.mkdir()
    for path in sorted(history.glob("alder_s*.rsw")):
        (copies / path.name).write_bytes(path.read_bytes().replace(b"\n", b"\r\n"))
    assert sum(p.stat().st_size for p in copies.iterdir()) > 1_000_000   # the workers store them
    new = copies / "alder_s99.rsw"
    new.write_bytes(encode_header(fw="t", start="2026-03-02T09:00:00+00:00")
                    + b"".join(encode_event(i * 700_000, "lever_down") for i in range(100)))
    before = count(db, "events")
    args = ["import", *sorted(copies.iterdir()), "--protocol", history / "alder.protocol.toml", "--db", db,
            "--no-fit", "--quiet", "--jobs", "2"]
    code, _, err = run(capsys, monkeypatch, io.StringIO(), *args)
    assert code == 2 and "was stored already from other bytes" in err
    code, out, err = run(capsys, monkeypatch, io.StringIO(), *args, "--skip-imported")
    assert code == 0, err
    assert err.count("stored already from other bytes") == len(list(history.glob("alder_s*.rsw")))
    assert count(db, "events") - before == 100


def test_an_import_refused_while_its_workers_start_ends_on_its_own_line_only(cohort_store):
    """Files already imported, over 1 MB (the workers start while the files are checked): the refusal is the
    command's one line, and no worker, still starting when the pool ended, adds a traceback after it."""
    history, db = cohort_store
    for _ in range(2):
        process = rigside("import", *sorted(history.glob("alder_s*.rsw")), "--protocol",
                          history / "alder.protocol.toml", "--db", db, "--no-fit", "--quiet", "--jobs", "2")
        out, err = process.communicate(timeout=120)   # until every process holding the pipes has ended
        assert process.returncode == 2 and "already imported" in err
        assert err.count("\n") == 1 and "Traceback" not in err, err
