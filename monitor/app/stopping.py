"""Clean stops on every platform: the signals and console events that ask rigside to stop.

Rule: the one seam for what differs by platform when a program is asked to
stop. POSIX: SIGINT (Ctrl-C), SIGTERM (kill, a service manager) and SIGHUP (the
terminal closed; left alone when it was ignored, as under nohup). Windows has
no SIGTERM or SIGHUP that anyone sends: there it is SIGINT (Ctrl-C), SIGBREAK
(Ctrl-Break) and the console's close, log-off and shut-down events, which
Windows delivers on a thread of its own and ends the process once that
handler returns (a close gives about 5 s). That handler asks the main thread
to stop exactly as Ctrl-C would (`_thread.interrupt_main`) and waits until the
program calls `finished()` (the store is flushed), or the time Windows allows
runs out. `on_stop` always runs on the main thread; `restore()` puts the
previous handlers back.
"""

from __future__ import annotations

import _thread
import signal
import sys
import threading
from collections.abc import Callable
from typing import Any

# Windows console control events (the values of wincon.h's CTRL_*_EVENT constants)
CTRL_C_EVENT, CTRL_BREAK_EVENT, CTRL_CLOSE_EVENT, CTRL_LOGOFF_EVENT, CTRL_SHUTDOWN_EVENT = 0, 1, 2, 5, 6
CONSOLE_WAIT_S = 4.5  # Windows ends a process about 5 s after a close event reached its handler


def stop_signals() -> list[signal.Signals]:
    """The signals that mean "stop" on this platform."""
    names = ("SIGINT", "SIGBREAK", "SIGTERM") if sys.platform == "win32" else ("SIGINT", "SIGTERM", "SIGHUP")
    return [getattr(signal, name) for name in names if hasattr(signal, name)]


class StopRequests:
    """Routes every way of being asked to stop to `on_stop`, on the main thread."""

    def __init__(self, on_stop: Callable[[], None]) -> None:
        self.on_stop = on_stop
        self._previous: dict[signal.Signals, Any] = {}
        self._done = threading.Event()
        self._console_handler: Any = None

    def install(self) -> "StopRequests":
        """Take over the stop signals (and, on Windows, the console's close events)."""
        for sig in stop_signals():
            previous = signal.getsignal(sig)
            if sig == getattr(signal, "SIGHUP", None) and previous == signal.SIG_IGN:
                continue                   # nohup: the user asked to survive the terminal closing
            self._previous[sig] = signal.signal(sig, self._on_signal)
        if sys.platform == "win32":
            self._console_handler = _set_console_handler(self.console_event, True)
        return self

    def _on_signal(self, signum: int, frame: Any) -> None:
        self.on_stop()

    def console_event(self, event: int) -> bool:
        """A Windows console event (on Windows' own thread); True when it was handled here."""
        if event not in (CTRL_CLOSE_EVENT, CTRL_LOGOFF_EVENT, CTRL_SHUTDOWN_EVENT):
            return False                   # Ctrl-C and Ctrl-Break: Python turns them into SIGINT/SIGBREAK
        _thread.interrupt_main(signal.SIGINT)
        self._done.wait(CONSOLE_WAIT_S)
        return True

    def restore(self) -> None:
        """Put back the handlers that were there before `install`."""
        for sig, previous in self._previous.items():
            signal.signal(sig, previous if previous is not None else signal.SIG_DFL)
        self._previous.clear()
        if self._console_handler is not None:
            _set_console_handler(self._console_handler, False)
            self._console_handler = None

    def finished(self) -> None:
        """The program has flushed what it must keep: restore the handlers, let a console close proceed."""
        self.restore()
        self._done.set()


def _set_console_handler(handler: Any, add: bool) -> Any:
    """Add (or remove) a console control handler with kernel32's SetConsoleCtrlHandler (Windows only)."""
    import ctypes
    from ctypes import wintypes

    if add:
        handler = ctypes.WINFUNCTYPE(wintypes.BOOL, wintypes.DWORD)(handler)  # kept: Windows calls it later
    ctypes.WinDLL("kernel32").SetConsoleCtrlHandler(handler, add)
    return handler
