"""A live source's reader thread: start, stop, and how it ends.

Rule: every live source (a serial port, a growing file) runs its reading in one
daemon thread whose lifecycle is written here once. `start()` runs
`_loop()` until `stop()` is asked; then `_finish()` delivers what is still
pending and the state becomes "stopped". Any exception, the sink's included,
ends the reader as "connection lost": the error is kept (`failure`), shown on
the status board and handed to `on_lost`; it is never swallowed, and an
`on_lost` that fails itself becomes a notice, not a second error. The
device (port or file handle) is closed however the thread ends. A subclass
says how to read (`_loop`), what to deliver at the end (`_finish`), how to
wake a blocked read (`_wake`) and how to close (`_close`).
"""

from __future__ import annotations

import threading
from typing import Callable

from drivers.status import LOST, STOPPED, SourceStatus, StatusBoard

LostHandler = Callable[[BaseException], None]


class ReaderThread:
    """The thread of one live source; `status()` may be called from any thread."""

    stop_timeout_s = 2.0  # how long `stop()` waits for the thread by default

    def __init__(self, name: str, board: StatusBoard, on_lost: LostHandler | None) -> None:
        self.board = board
        self.on_lost = on_lost
        self.failure: BaseException | None = None
        self._name = name
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None

    # --- control (any thread) -------------------------------------------------

    def start(self) -> None:
        self._thread = threading.Thread(target=self._run, name=self._name, daemon=True)
        self._thread.start()

    def stop(self, timeout: float | None = None) -> None:
        """Stop reading; what is pending is delivered first (`_finish`)."""
        self._stop.set()
        self._wake()
        if self._thread is not None:
            self._thread.join(self.stop_timeout_s if timeout is None else timeout)

    @property
    def alive(self) -> bool:
        return self._thread is not None and self._thread.is_alive()

    def status(self) -> SourceStatus:
        return self.board.snapshot()

    # --- the thread -------------------------------------------------------------

    def _run(self) -> None:
        try:
            self._loop()
            self._finish()
            self.board.set_state(STOPPED)
        except BaseException as exc:  # noqa: BLE001 - surfaced as "connection lost", never swallowed
            self._lost(exc)
        finally:
            self._close()

    def _lost(self, exc: BaseException) -> None:
        self.failure = exc
        self.board.error(f"{type(exc).__name__}: {exc}")
        self.board.set_state(LOST)
        if self.on_lost is not None:
            try:
                self.on_lost(exc)
            except Exception as inner:  # noqa: BLE001 - the first error is the one to show
                self.board.notice(f"on_lost handler failed: {inner!r}")

    # --- what a source says -------------------------------------------------------

    def _loop(self) -> None:
        """Read until `self._stop` is set."""
        raise NotImplementedError

    def _finish(self) -> None:
        """Deliver what is pending once reading stopped."""
        raise NotImplementedError

    def _wake(self) -> None:
        """Interrupt a blocked read so that `stop()` is quick (nothing to do by default)."""

    def _close(self) -> None:
        """Close the device; called however the thread ends."""
        raise NotImplementedError
