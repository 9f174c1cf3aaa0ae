"""Progress and cancel of long work: a bar on a terminal, the same counts in the window.

Rule: a long piece of work (import and its fits, CSV and NWB export) is one
function that takes a `Tracker`: it says its total (`begin`), counts units
done (`advance`), prints its lines through `say`, and asks `cancelled()` at
every safe point (between files, sessions or chunks), where it stops and
returns what it finished; it writes files under a temporary name and
database rows in transactions, so stopping anywhere leaves nothing
half-written. The command line's tracker is `Progress`: on a terminal a tqdm
bar on stderr with counts, rate and time left, redrawn at most ten times a
second; when stderr is not a terminal, or with `--quiet`, nothing is drawn,
so logs and pipes stay clean (`sync` counts its chunks on a `Progress` the
same way). Inside `with Progress(...)` on the main thread
the first Ctrl-C only asks the work to stop at its next safe point (the
command then names what was finished and exits 130); a second Ctrl-C
interrupts at once. A process started with Ctrl-C ignored (a background job)
keeps ignoring it. The window's tracker is monitor.app.window.file_jobs'. The
closing summary line is the command's own.
"""

from __future__ import annotations

import os
import signal
import sys
import threading
from typing import Any, Protocol, TextIO

INTERRUPTED = 130  # the exit code of a command stopped by Ctrl-C (128 + SIGINT), as shells report it


class Tracker(Protocol):
    """What long work reports to, and asks whether to stop."""

    def begin(self, total: int, unit: str, label: str) -> None: ...

    def advance(self, amount: int = 1) -> None: ...

    def say(self, line: str) -> None: ...

    def cancelled(self) -> bool: ...


class Progress:
    """Work done of `total` units on a terminal; a context manager that closes the bar and catches Ctrl-C."""

    def __init__(self, total: int = 0, unit: str = "", label: str = "", quiet: bool = False,
                 stream: TextIO | None = None) -> None:
        self.stream = stream if stream is not None else sys.stderr
        self.shown = not quiet and _is_terminal(self.stream)
        self.done = 0
        self.total = total
        self._bar: Any = None
        self._stop = threading.Event()
        self._previous_handler: Any = None
        if total:
            self.begin(total, unit, label)

    def begin(self, total: int, unit: str, label: str) -> None:
        """Start (or restart) the bar for `total` units."""
        self.close()
        self.done, self.total = 0, total
        if self.shown:
            from tqdm import tqdm  # lazy: only a terminal needs it

            sized = _sized(self.stream)   # a terminal that states no size (0 x 0) gets 80 x 24
            self._bar = tqdm(total=total, unit=unit, desc=label, file=self.stream, mininterval=0.1,
                             unit_scale=total >= 100_000, dynamic_ncols=sized, ncols=None if sized else 80,
                             nrows=None if sized else 24, leave=False)

    def advance(self, amount: int = 1) -> None:
        """Count `amount` more units done."""
        self.done += amount
        if self._bar is not None:
            self._bar.update(amount)

    def say(self, line: str) -> None:
        """Print a line on the command's stream without breaking the bar."""
        if self._bar is not None:
            self._bar.write(line, file=self.stream)
        else:
            print(line, file=self.stream)

    def cancelled(self) -> bool:
        """True once Ctrl-C was pressed inside the `with` block."""
        return self._stop.is_set()

    def close(self) -> None:
        if self._bar is not None:
            self._bar.close()
            self._bar = None

    def _interrupt(self, signum: int, frame: object) -> None:
        """First Ctrl-C: stop at the next safe point; the next one interrupts at once."""
        self._stop.set()
        signal.signal(signal.SIGINT, signal.default_int_handler)

    def __enter__(self) -> Progress:
        if threading.current_thread() is threading.main_thread() \
                and signal.getsignal(signal.SIGINT) is not signal.SIG_IGN:  # a background job ignores Ctrl-C
            self._previous_handler = signal.signal(signal.SIGINT, self._interrupt)
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()
        if self._previous_handler is not None:
            signal.signal(signal.SIGINT, self._previous_handler)
            self._previous_handler = None


def _sized(stream: TextIO) -> bool:
    """True when the terminal states its size (tqdm draws nothing on one of 0 rows)."""
    try:
        size = os.get_terminal_size(stream.fileno())
    except (AttributeError, OSError, ValueError):  # io.UnsupportedOperation is an OSError and a ValueError
        return False
    return size.columns > 0 and size.lines > 0


def _is_terminal(stream: TextIO) -> bool:
    try:
        return stream.isatty()
    except (AttributeError, ValueError):  # a closed or replaced stream
        return False
