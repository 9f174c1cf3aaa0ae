"""Where a simulated box's bytes go: a pseudo-terminal, a growing file or stdout.

Rule: outputs take whole lines and never block the simulation. A pty master is
written non-blocking through a backlog of whole lines (a master blocks once
~17 KB are unread); past `backlog_limit` bytes, whole lines are dropped and
counted, never half a line. `sent` logs each line once it is fully written
(when `record` is on), per connection, so tests can compare what a reader got
with what the box sent. An unplug closes the master (unread bytes are lost,
as with a real cable) and removes the symlink; a re-plug opens a new pty and
points the symlink at it (the old device name is held until then, so the new
device has a new name, as a re-plugged board often does). The box boots when a reader opens the port: the
slave's line speed starts at a sentinel that any serial open changes (an
Arduino-style board resets on open). A file output appends like acquisition
code does, flushing per line or per burst.
"""

from __future__ import annotations

import fcntl
import os
import pty
import struct
import sys
import termios
import threading
import time
import tty
from collections import deque
from pathlib import Path
from typing import BinaryIO, Protocol

SENTINEL_SPEED = termios.B50


class Output(Protocol):
    """What the player needs from an output."""

    sent: list[list[bytes]]

    def write(self, line: bytes) -> None: ...
    def pump(self) -> None: ...
    def flush(self) -> None: ...
    def unplug(self) -> None: ...
    def replug(self) -> None: ...
    def ready(self) -> bool: ...
    def close(self) -> None: ...


class _Base:
    def __init__(self, record: bool) -> None:
        self.record = record
        self.sent: list[list[bytes]] = [[]]
        self.lines_written = 0
        self.lines_dropped = 0
        self.plugged = True

    def _log(self, line: bytes) -> None:
        self.lines_written += 1
        if self.record:
            self.sent[-1].append(line)

    def pump(self) -> None:
        """Push pending bytes out (no-op for outputs that write at once)."""

    def flush(self) -> None:
        """Flush buffered bytes (per burst)."""

    def ready(self) -> bool:
        """True when a reader can receive what the box sends."""
        return self.plugged

    def unplug(self) -> None:
        self.plugged = False

    def replug(self) -> None:
        self.plugged = True
        self.sent.append([])

    def close(self) -> None:
        self.plugged = False


class PtyOutput(_Base):
    """A pseudo-terminal that pyserial opens as a real serial device."""

    def __init__(
        self,
        link: str | Path | None = None,
        wait_for_open: bool = True,
        backlog_limit: int = 1 << 20,
        record: bool = False,
    ) -> None:
        super().__init__(record)
        self.link = Path(link) if link is not None else None
        self.wait_for_open = wait_for_open
        self.backlog_limit = backlog_limit
        self.devices: list[str] = []
        self._lock = threading.Lock()
        self._backlog: deque[bytes] = deque()
        self._backlog_bytes = 0
        self._partial = 0  # bytes of the backlog's first line already written
        self._master = self._slave = -1
        self._opened = False
        self._open_pty()

    @property
    def device(self) -> str | None:
        """The current slave device path (None while unplugged)."""
        return self.devices[-1] if self.plugged and self.devices else None

    def _open_pty(self) -> None:
        master, slave = pty.openpty()
        tty.setraw(slave)
        attrs = termios.tcgetattr(slave)
        attrs[4] = attrs[5] = SENTINEL_SPEED
        termios.tcsetattr(slave, termios.TCSANOW, attrs)
        fcntl.fcntl(master, fcntl.F_SETFL, fcntl.fcntl(master, fcntl.F_GETFL) | os.O_NONBLOCK)
        if self._slave >= 0:  # the old device's name was held until now: the new one differs
            os.close(self._slave)
        self._master, self._slave = master, slave
        self._opened = not self.wait_for_open
        self.devices.append(os.ttyname(slave))
        if self.link is not None:
            self.link.parent.mkdir(parents=True, exist_ok=True)
            temp = self.link.with_name(self.link.name + ".new")
            temp.unlink(missing_ok=True)
            temp.symlink_to(self.devices[-1])
            os.replace(temp, self.link)

    def ready(self) -> bool:
        """Plugged and opened by a reader (or not waiting for one)."""
        if not self.plugged:
            return False
        if not self._opened:
            speeds = termios.tcgetattr(self._slave)[4:6]
            self._opened = speeds != [SENTINEL_SPEED, SENTINEL_SPEED]
        return self._opened

    @property
    def backlog_bytes(self) -> int:
        """Bytes waiting in the backlog for the master to take them."""
        return self._backlog_bytes - self._partial

    def unread(self) -> int:
        """Bytes written to the master that no reader has taken yet, backlog included."""
        if not self.plugged:
            return 0
        waiting = struct.unpack("i", fcntl.ioctl(self._slave, termios.FIONREAD, b"\0" * 4))[0]
        return waiting + self._backlog_bytes - self._partial

    def write(self, line: bytes) -> None:
        with self._lock:
            if not self.plugged:
                self.lines_dropped += 1
                return
            if self._backlog_bytes + len(line) > self.backlog_limit:
                self.lines_dropped += 1
                return
            self._backlog.append(line)
            self._backlog_bytes += len(line)
        self.pump()

    def pump(self) -> None:
        with self._lock:
            while self._backlog and self.plugged:
                line = self._backlog[0]
                try:
                    n = os.write(self._master, line[self._partial :])
                except (BlockingIOError, InterruptedError):
                    return
                self._partial += n
                if self._partial < len(line):
                    return
                self._backlog.popleft()
                self._backlog_bytes -= len(line)
                self._partial = 0
                self._log(line)

    def unplug(self) -> None:
        """Pull the cable: close the master (unread bytes are lost) and remove the symlink."""
        with self._lock:
            if not self.plugged:
                return
            self.plugged = False
            self.lines_dropped += len(self._backlog)
            self._backlog.clear()
            self._backlog_bytes = self._partial = 0
            os.close(self._master)
            self._master = -1
            if self.link is not None:
                self.link.unlink(missing_ok=True)

    def replug(self) -> None:
        """Plug back in: a new pty, the symlink re-pointed at it."""
        with self._lock:
            if self.plugged:
                return
            self._open_pty()
            self.plugged = True
            self.sent.append([])

    def close(self) -> None:
        self.unplug()
        if self._slave >= 0:
            os.close(self._slave)
            self._slave = -1


class FileOutput(_Base):
    """Appends lines to a growing file, flushing per line or per burst."""

    def __init__(self, path: str | Path, per_line: bool = True, record: bool = False) -> None:
        super().__init__(record)
        self.path = Path(path)
        self.per_line = per_line
        self._file: BinaryIO | None = open(self.path, "ab")

    def write(self, line: bytes) -> None:
        if not self.plugged or self._file is None:
            self.lines_dropped += 1
            return
        self._file.write(line)
        if self.per_line:
            self._file.flush()
        self._log(line)

    def flush(self) -> None:
        if self._file is not None:
            self._file.flush()

    def close(self) -> None:
        super().close()
        if self._file is not None:
            self._file.close()
            self._file = None


class StreamOutput(_Base):
    """Writes lines to a binary stream (stdout by default), flushing each line."""

    def __init__(self, stream: BinaryIO | None = None, record: bool = False) -> None:
        super().__init__(record)
        self.stream = stream if stream is not None else sys.stdout.buffer

    def write(self, line: bytes) -> None:
        if not self.plugged:
            self.lines_dropped += 1
            return
        try:
            self.stream.write(line)
            self.stream.flush()
        except BrokenPipeError:
            self.plugged = False
            return
        self._log(line)


def wait_until(condition, timeout: float, step: float = 0.01) -> bool:
    """Poll `condition` until true or `timeout` seconds pass."""
    deadline = time.monotonic() + timeout
    while not condition():
        if time.monotonic() >= deadline:
            return False
        time.sleep(step)
    return True
