"""Progress bars: drawn on a terminal, silent in pipes and with --quiet, lines kept above the bar."""

from __future__ import annotations

import io
import sys

import pytest

from monitor.app.progress import Progress


class Terminal(io.StringIO):
    def isatty(self) -> bool:
        return True


def test_a_terminal_gets_counts_and_the_lines_said():
    screen = Terminal()
    with Progress(10, "file", "importing", stream=screen) as progress:
        progress.advance(3)
        progress.say("[3/10] alder_s03.rsw: 1 session")
        progress.advance(7)
    text = screen.getvalue()
    assert progress.shown and progress.done == 10
    assert "importing" in text and "3/10" in text
    assert "[3/10] alder_s03.rsw: 1 session\n" in text


def test_a_pipe_gets_only_the_lines_said():
    pipe = io.StringIO()
    with Progress(5, "file", "importing", stream=pipe) as progress:
        progress.advance(2)
        progress.say("one line")
    assert not progress.shown and pipe.getvalue() == "one line\n" and progress.done == 2


def test_quiet_draws_no_bar_on_a_terminal():
    screen = Terminal()
    with Progress(5, "file", "importing", quiet=True, stream=screen) as progress:
        progress.advance(5)
    assert not progress.shown and screen.getvalue() == ""


@pytest.mark.skipif(sys.platform == "win32", reason="sends a POSIX SIGINT to this process")
def test_the_first_ctrl_c_asks_to_stop_and_the_handler_is_restored_after():
    import os
    import signal

    before = signal.getsignal(signal.SIGINT)
    with Progress(quiet=True) as progress:
        assert not progress.cancelled()
        os.kill(os.getpid(), signal.SIGINT)   # a real SIGINT to this process: the handler runs, no exception
        assert progress.cancelled()
        assert signal.getsignal(signal.SIGINT) is signal.default_int_handler   # a second one interrupts at once
    assert signal.getsignal(signal.SIGINT) is before


def test_a_process_that_ignores_ctrl_c_keeps_ignoring_it():
    import signal

    previous = signal.signal(signal.SIGINT, signal.SIG_IGN)
    try:
        with Progress(quiet=True):
            assert signal.getsignal(signal.SIGINT) is signal.SIG_IGN
    finally:
        signal.signal(signal.SIGINT, previous)
