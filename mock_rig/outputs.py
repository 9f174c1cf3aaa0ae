"""Where a simulated box's bytes go: a pseudo-terminal, a local TCP socket, a growing file or stdout.

Rule: outputs take whole lines and never block the simulation. A pty master
and a socket are written non-blocking through a backlog of whole lines (a
master blocks once ~17 KB are unread); past `backlog_limit` bytes, whole lines
are dropped and counted, never half a line. `sent` logs each line once it is
fully written (when `record` is on), per connection, so tests can compare what
a reader got with what the box sent. An unplug closes the master (unread bytes
are lost, as with a real cable) and removes the symlink; a re-plug opens a new
pty and points the symlink at it (the old device name is held until then, so
the new device has a new name, as a re-plugged board often does). The box
boots when a reader opens the port: the slave's line speed starts at a
sentinel that any serial open changes (an Arduino-style board resets on open).
The pty calls are POSIX-only and live in `mock_rig.ptys`, imported only when a
pty is made. Where there are no ptys (Windows), a `SocketOutput` serves
`socket://127.0.0.1:PORT`, which pyserial opens through the same `Serial` API
as a COM port: the box boots shortly after a reader connects, an unplug closes
the connection and stops listening, a re-plug listens on the same port again.
A file output appends like acquisition code does, flushing per line or per
burst.
"""

from __future__ import annotations

import os
import socket
import sys
import threading
import time
from collections import deque
from pathlib import Path
from typing import BinaryIO, Protocol

SOCKET_BOOT_S = 0.2  # after a reader connects, before the box sends its header (a reset board boots)


def pty_available() -> bool:
    """True where pseudo-terminals can be made (POSIX; not Windows)."""
    try:
        import mock_rig.ptys  # noqa: F401  (the platform seam: POSIX-only modules)
    except ImportError:
        return False
    return hasattr(os, "ttyname")


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


class _Backlogged(_Base):
    """A device written non-blocking through a backlog of whole lines (a pty master, a socket).

    A subclass says how bytes go out now (`_send`), whether anyone can take them
    (`_can_send`), and how the device is pulled and plugged back (`_disconnect`,
    `_connect`); the backlog, its limit, unplug and re-plug are written here once.
    """

    def __init__(self, record: bool, backlog_limit: int) -> None:
        super().__init__(record)
        self.backlog_limit = backlog_limit
        self._lock = threading.Lock()
        self._backlog: deque[bytes] = deque()
        self._backlog_bytes = 0
        self._partial = 0  # bytes of the backlog's first line already written

    @property
    def backlog_bytes(self) -> int:
        """Bytes waiting in the backlog for the device to take them."""
        return self._backlog_bytes - self._partial

    def write(self, line: bytes) -> None:
        with self._lock:
            if not self.plugged or self._backlog_bytes + len(line) > self.backlog_limit:
                self.lines_dropped += 1
                return
            self._backlog.append(line)
            self._backlog_bytes += len(line)
        self.pump()

    def pump(self) -> None:
        with self._lock:
            self._before_pump()
            while self._backlog and self._can_send():
                line = self._backlog[0]
                n = self._send(line[self._partial:])
                if not n:
                    return
                self._partial += n
                if self._partial < len(line):
                    return
                self._backlog.popleft()
                self._backlog_bytes -= len(line)
                self._partial = 0
                self._log(line)

    def unplug(self) -> None:
        """Pull the cable: the backlog is lost (counted as dropped lines) and the device goes."""
        with self._lock:
            if not self.plugged:
                return
            self.plugged = False
            self.lines_dropped += len(self._backlog)
            self._backlog.clear()
            self._backlog_bytes = self._partial = 0
            self._disconnect()

    def replug(self) -> None:
        """Plug back in: the device comes back, and a new connection's log begins."""
        with self._lock:
            if self.plugged:
                return
            self._connect()
            self.plugged = True
            self.sent.append([])

    def _before_pump(self) -> None:
        """Called under the lock before the backlog is pushed (nothing by default)."""

    def _can_send(self) -> bool:
        return self.plugged

    def _send(self, data: bytes) -> int:
        """Write what the device takes now; 0 when it takes nothing now."""
        raise NotImplementedError

    def _disconnect(self) -> None:
        raise NotImplementedError

    def _connect(self) -> None:
        raise NotImplementedError


class PtyOutput(_Backlogged):
    """A pseudo-terminal that pyserial opens as a real serial device."""

    def __init__(
        self,
        link: str | Path | None = None,
        wait_for_open: bool = True,
        backlog_limit: int = 1 << 20,
        record: bool = False,
    ) -> None:
        super().__init__(record, backlog_limit)
        self.link = Path(link) if link is not None else None
        self.wait_for_open = wait_for_open
        self.devices: list[str] = []
        self._master = self._slave = -1
        self._opened = False
        self._open_pty()

    @property
    def device(self) -> str | None:
        """The current slave device path (None while unplugged)."""
        return self.devices[-1] if self.plugged and self.devices else None

    def _open_pty(self) -> None:
        from mock_rig import ptys

        master, slave, name = ptys.open_pty()
        if self._slave >= 0:  # the old device's name was held until now: the new one differs
            os.close(self._slave)
        self._master, self._slave = master, slave
        self._opened = not self.wait_for_open
        self.devices.append(name)
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
            from mock_rig import ptys

            self._opened = ptys.was_opened(self._slave)
        return self._opened

    def unread(self) -> int:
        """Bytes written to the master that no reader has taken yet, backlog included."""
        if not self.plugged:
            return 0
        from mock_rig import ptys

        return ptys.unread(self._slave) + self.backlog_bytes

    def _send(self, data: bytes) -> int:
        try:
            return os.write(self._master, data)
        except (BlockingIOError, InterruptedError):
            return 0

    def _disconnect(self) -> None:
        """Close the master (unread bytes are lost) and remove the symlink."""
        os.close(self._master)
        self._master = -1
        if self.link is not None:
            self.link.unlink(missing_ok=True)

    def _connect(self) -> None:
        """A new pty, the symlink re-pointed at it."""
        self._open_pty()

    def close(self) -> None:
        self.unplug()
        if self._slave >= 0:
            os.close(self._slave)
            self._slave = -1


class SocketOutput(_Backlogged):
    """A box on a local TCP port, read as `socket://127.0.0.1:PORT` by pyserial (no pty needed)."""

    def __init__(
        self,
        port: int = 0,
        host: str = "127.0.0.1",
        wait_for_open: bool = True,
        backlog_limit: int = 1 << 20,
        record: bool = False,
    ) -> None:
        super().__init__(record, backlog_limit)
        self.host = host
        self.wait_for_open = wait_for_open
        self._conn: socket.socket | None = None
        self._booted_at: float | None = None
        self._listener: socket.socket | None = None
        self._listen(port)
        self.port = self._listener.getsockname()[1] if self._listener else port

    @property
    def url(self) -> str:
        """What a reader opens: pyserial's URL for this box."""
        return f"socket://{self.host}:{self.port}"

    @property
    def device(self) -> str | None:
        """The URL while plugged in (None while unplugged), like a pty's device path."""
        return self.url if self.plugged else None

    def _listen(self, port: int) -> None:
        listener = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
        if os.name == "posix":  # re-plug on the same port while the old connection is in TIME_WAIT
            listener.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
        listener.bind((self.host, port))
        listener.listen(1)
        listener.setblocking(False)
        self._listener = listener

    def _accept(self) -> None:
        """Take a waiting reader; a newer one replaces the old (a port reopened after a fault)."""
        if self._listener is None:
            return
        try:
            conn, _ = self._listener.accept()
        except (BlockingIOError, InterruptedError):
            return
        except OSError:
            return
        conn.setblocking(False)
        if self._conn is not None:
            self._conn.close()
            self.sent.append([])
        self._conn = conn
        self._booted_at = time.monotonic() + SOCKET_BOOT_S

    def ready(self) -> bool:
        """Plugged, a reader connected and the box booted (or not waiting for a reader)."""
        if not self.plugged:
            return False
        with self._lock:
            self._accept()
        if not self.wait_for_open:
            return True
        return self._conn is not None and self._booted_at is not None and time.monotonic() >= self._booted_at

    def unread(self) -> int:
        """Bytes the box said but the socket has not taken yet."""
        return self.backlog_bytes if self.plugged else 0

    def _before_pump(self) -> None:
        self._accept()

    def _can_send(self) -> bool:
        return self._conn is not None

    def _send(self, data: bytes) -> int:
        assert self._conn is not None
        try:
            return self._conn.send(data)
        except (BlockingIOError, InterruptedError):
            return 0
        except OSError:  # the reader went away: wait for the next one
            self._conn.close()
            self._conn = None
            return 0

    def _disconnect(self) -> None:
        """Drop the connection and stop listening (a reader's reconnect fails)."""
        for sock in (self._conn, self._listener):
            if sock is not None:
                sock.close()
        self._conn = self._listener = None
        self._booted_at = None

    def _connect(self) -> None:
        """Listen on the same port again."""
        self._listen(self.port)

    def close(self) -> None:
        self.unplug()


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
