"""Stop requests on every platform reach the program's stop on the main thread, and a Windows
console close waits until the store is flushed. The POSIX signals are real (os.kill); the
Windows console event is fed to the same handler Windows would call (its thread, its event
number from wincon.h), since kernel32 exists only there."""

from __future__ import annotations

import contextlib
import os
import signal
import sqlite3
import subprocess
import sys
import threading
import time

import pytest

from drivers.wire import encode_event, encode_header
from fixtures.protocols import protocol_toml
from monitor.app import stopping
from monitor.app.stopping import StopRequests, stop_signals


def test_the_stop_signals_of_each_platform(monkeypatch):
    monkeypatch.setattr(sys, "platform", "linux")
    assert signal.SIGTERM in stop_signals() and signal.SIGINT in stop_signals()
    monkeypatch.setattr(sys, "platform", "win32")
    # Windows sends no SIGTERM but Python may define it; SIGBREAK exists only there (Python signal docs)
    assert stop_signals()[0] == signal.SIGINT
    assert all(s in (signal.SIGINT, signal.SIGTERM, getattr(signal, "SIGBREAK", None)) for s in stop_signals())


@pytest.mark.skipif(os.name != "posix", reason="os.kill with SIGTERM is a POSIX signal")
@pytest.mark.parametrize("name", ["SIGINT", "SIGTERM", "SIGHUP"])
def test_a_signal_calls_on_stop_on_the_main_thread_and_restore_puts_back_the_old_handler(name):
    sig = getattr(signal, name)
    before = signal.getsignal(sig)
    seen = []
    stops = StopRequests(lambda: seen.append(threading.current_thread() is threading.main_thread())).install()
    try:
        os.kill(os.getpid(), sig)
        deadline = time.monotonic() + 5
        while not seen and time.monotonic() < deadline:
            time.sleep(0.01)          # Python runs the handler between bytecodes of the main thread
    finally:
        stops.restore()
    assert seen == [True]
    assert signal.getsignal(sig) == before


@pytest.mark.skipif(not hasattr(signal, "SIGHUP"), reason="SIGHUP is POSIX")
def test_an_ignored_hangup_stays_ignored():
    previous = signal.signal(signal.SIGHUP, signal.SIG_IGN)   # what nohup does
    try:
        stops = StopRequests(lambda: None).install()
        assert signal.getsignal(signal.SIGHUP) == signal.SIG_IGN
        stops.restore()
    finally:
        signal.signal(signal.SIGHUP, previous)


def test_console_close_stops_on_the_main_thread_and_waits_for_the_flush(monkeypatch):
    monkeypatch.setattr(stopping, "CONSOLE_WAIT_S", 10.0)
    order: list[str] = []
    stops = StopRequests(lambda: order.append("stop on main" if threading.current_thread()
                                              is threading.main_thread() else "stop elsewhere")).install()
    answers: list[bool] = []

    def windows_thread() -> None:          # Windows calls the handler on a thread of its own
        answers.append(stops.console_event(stopping.CTRL_CLOSE_EVENT))
        order.append("handler returned")

    thread = threading.Thread(target=windows_thread)
    try:
        thread.start()
        deadline = time.monotonic() + 5
        while not order and time.monotonic() < deadline:
            time.sleep(0.01)
        time.sleep(0.2)
        assert order == ["stop on main"]   # the handler is still waiting: the store is not flushed yet
        order.append("flushed")
        stops.finished()
        thread.join(5)
    finally:
        stops.restore()
    assert order == ["stop on main", "flushed", "handler returned"] and answers == [True]


def test_ctrl_c_and_ctrl_break_are_left_to_python():
    stops = StopRequests(lambda: None)
    assert stops.console_event(stopping.CTRL_C_EVENT) is False
    assert stops.console_event(stopping.CTRL_BREAK_EVENT) is False


PROTOCOL = protocol_toml(plateau_sessions=3)


def stored(db) -> int:
    try:
        with contextlib.closing(sqlite3.connect(f"file:{db}?mode=ro", uri=True, timeout=5)) as conn:
            return conn.execute("SELECT count(*) FROM events").fetchone()[0]
    except sqlite3.OperationalError:
        return 0                                     # not created yet


@pytest.mark.skipif(not hasattr(signal, "SIGHUP"), reason="SIGHUP is POSIX")
def test_closing_the_terminal_stops_record_with_everything_stored(tmp_path):
    log, db = tmp_path / "box1.rsw", tmp_path / "store.sqlite3"
    log.write_bytes(encode_header(fw="t") + b"".join(encode_event(i * 1000, "lick") for i in range(200)))
    (tmp_path / "p.toml").write_text(PROTOCOL)
    proc = subprocess.Popen([sys.executable, "-m", "monitor.app", "record", "--source", f"file:{log}", "--rig", "box1",
                             "--animal", "heron", "--new-animal", "--protocol", str(tmp_path / "p.toml"), "--db",
                             str(db)],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    try:
        first = proc.stderr.readline()               # the recorder says where it reads from once it runs
        assert "byte 0" in first, first
        deadline = time.monotonic() + 60
        while stored(db) < 200 and time.monotonic() < deadline:
            time.sleep(0.1)
        proc.send_signal(signal.SIGHUP)              # what a closing terminal sends its programs
        proc.wait(timeout=60)
        out, err = proc.stdout.read(), proc.stderr.read()   # through the readers that read the first line
    finally:
        proc.kill()
    assert proc.returncode == 0, err
    with sqlite3.connect(db) as conn:                # read with plain sqlite3, not the store's code
        events = conn.execute("SELECT count(*) FROM events").fetchone()[0]
        open_sessions = conn.execute("SELECT count(*) FROM sessions WHERE ended_at IS NULL").fetchone()[0]
    assert events == 200 and open_sessions == 0         # the session was ended: a clean stop, not a kill
    assert "recorded 200 events" in out
