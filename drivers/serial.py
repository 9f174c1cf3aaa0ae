"""Serial source: one pyserial reader thread per port, with unplug, reconnect and gaps.

Rule: the reader reads whatever is waiting and feeds the line decoder; every
record reaches the sink in order, in `Batch`es, from this thread only.
`SerialException` and `OSError` from the port are an unplug: the port is
closed at once, a gap opens, and the configured path (which may be a
`/dev/serial/by-id/...` symlink, a COM name or a pyserial URL) is tried again
every `retry_s`, then the device with the configured USB serial number, found
with `serial.tools.list_ports`. Every byte received goes to the decoder as it
arrives, exactly as a file's bytes do (one reading of the bytes for both
paths): nothing is held or dropped while waiting for a header. Boot noise
becomes malformed lines (kept, counted); a header glued to a line cut short by
a reset is split off by the decoder. Each reopen starts a new clock segment
with the last known clock (the board's counter may have restarted); a header,
when one comes, starts its own. A rig whose board resets when the port opens
(`wait_for_header`, the default) is expected to send its header within
`header_wait_s`; if none comes, a notice says so (set `reset = false` for
boards that do not reset). Any other exception —
one raised by the sink included — ends the reader with the state
"connection lost" and the error; it is never swallowed. On POSIX ports are
opened with `exclusive=True`. `import serial` here is pyserial (absolute
imports).
"""

from __future__ import annotations

import os
import time
from pathlib import Path
from typing import Callable, NamedTuple

import serial
from serial.tools import list_ports

from drivers.reader import ReaderThread
from drivers.status import CONNECTED, WAITING, Batch, BatchSink, Gap, StatusBoard
from drivers.wire import Header, LineDecoder, Record, WireDecoder

DEFAULT_BAUD = 115200
RETRY_S = 0.2  # how often a missing device is looked for (contract: back within 2 s)
READ_TIMEOUT_S = 0.1  # longest a read blocks: bounds stop latency and idle wake-ups
HEADER_WAIT_S = 3.0  # after an open, how long a resetting board may take to send its header line

PortOpener = Callable[[str], serial.SerialBase]


class PortInfo(NamedTuple):
    """A candidate serial device, for choosing a rig's port."""

    device: str
    description: str
    serial_number: str | None
    vid_pid: str | None  # "2341:0043"
    manufacturer: str | None
    links: tuple[str, ...]  # stable /dev/serial/by-id names that point at `device`


def list_serial_ports() -> list[PortInfo]:
    """Serial devices present now, with USB description, serial number and VID:PID."""
    links = _stable_links()
    found = []
    for port in list_ports.comports():
        vid_pid = f"{port.vid:04X}:{port.pid:04X}" if port.vid is not None and port.pid is not None else None
        found.append(PortInfo(port.device, port.description or "", port.serial_number, vid_pid,
                              port.manufacturer, links.get(os.path.realpath(port.device), ())))
    return sorted(found, key=lambda p: p.device)


def find_by_serial_number(usb_serial: str) -> str | None:
    """The device path of the USB device with this serial number, if present."""
    for port in list_ports.comports():
        if port.serial_number == usb_serial:
            return port.device
    return None


def _stable_links(folder: str = "/dev/serial/by-id") -> dict[str, tuple[str, ...]]:
    links: dict[str, list[str]] = {}
    base = Path(folder)
    if base.is_dir():
        for link in sorted(base.iterdir()):
            links.setdefault(os.path.realpath(link), []).append(str(link))
    return {device: tuple(names) for device, names in links.items()}


def open_port(path: str, baudrate: int = DEFAULT_BAUD) -> serial.SerialBase:
    """Open a device path or a pyserial URL (loop://, socket://host:port)."""
    if "://" in path:
        return serial.serial_for_url(path, baudrate=baudrate, timeout=READ_TIMEOUT_S)
    exclusive = True if os.name == "posix" else None
    return serial.Serial(path, baudrate=baudrate, timeout=READ_TIMEOUT_S, exclusive=exclusive)


class SerialSource(ReaderThread):
    """Reads one serial device in a thread (drivers/reader.py); `status()` may be called from any thread."""

    def __init__(
        self,
        port: str,
        sink: BatchSink,
        *,
        usb_serial: str | None = None,
        baudrate: int = DEFAULT_BAUD,
        decoder: LineDecoder | None = None,
        wait_for_header: bool = True,
        header_wait_s: float = HEADER_WAIT_S,
        retry_s: float = RETRY_S,
        silent_after_s: float = 5.0,
        opener: PortOpener | None = None,
        on_lost: Callable[[BaseException], None] | None = None,
        wall_clock: Callable[[], float] = time.time,
    ) -> None:
        super().__init__(f"serial {port}", StatusBoard(silent_after_s), on_lost)
        self.port = port
        self.usb_serial = usb_serial
        self.baudrate = baudrate
        self.decoder = decoder if decoder is not None else WireDecoder()
        self.wait_for_header = wait_for_header and isinstance(self.decoder, WireDecoder)
        self.header_wait_s = header_wait_s
        self.retry_s = retry_s
        self.opened_path: str | None = None  # the device actually open now
        self._sink = sink
        self._opener = opener or (lambda path: open_port(path, baudrate))
        self._wall = wall_clock
        self._port: serial.SerialBase | None = None
        self._opens = 0
        self._gap_start: float | None = None
        self._gap_reason = ""
        self._header_due: float | None = None  # monotonic time a resetting board's header is expected by

    # --- control (any thread) -------------------------------------------------

    def _wake(self) -> None:
        """A read blocked on the port returns at once."""
        port = self._port
        if port is not None and hasattr(port, "cancel_read"):
            try:
                port.cancel_read()
            except (serial.SerialException, OSError, NotImplementedError):
                pass

    @property
    def ever_opened(self) -> bool:
        """Was the port opened at least once?"""
        return self._opens > 0

    # --- reader thread ----------------------------------------------------------

    def _loop(self) -> None:
        while not self._stop.is_set():
            if self._port is None and not self._connect():
                self._stop.wait(self.retry_s)
                continue
            try:
                data = self._read()
            except (serial.SerialException, OSError) as exc:
                self._unplugged(exc)
                continue
            if data:
                self._deliver(self.decoder.feed(data))
            if self._header_due is not None and time.monotonic() > self._header_due:
                self._header_due = None
                self.board.notice(f"no header line within {self.header_wait_s:g} s of opening: the board "
                                  "may not reset when the port opens (set reset = false for this rig)")

    def _read(self) -> bytes:
        assert self._port is not None
        first = self._port.read(1)  # blocks at most READ_TIMEOUT_S
        if not first:
            return b""
        waiting = self._port.in_waiting
        return first + self._port.read(waiting) if waiting else first

    def _connect(self) -> bool:
        """Open the configured path, else the device with the configured USB serial number."""
        problem = self._try_open(self.port)
        if problem and self.usb_serial:
            found = find_by_serial_number(self.usb_serial)
            if found and found != self.port:
                problem = self._try_open(found)
        if not problem:
            self._opened()
            return True
        if self._gap_start is None:
            self._gap_start, self._gap_reason = self._wall(), "device not present at start"
            self.board.gap_started(self._gap_start, problem)
        self.board.set_state(WAITING)
        return False

    def _try_open(self, path: str) -> str:
        """Open `path`; return "" on success, else what went wrong."""
        try:
            self._port = self._opener(path)
        except (serial.SerialException, OSError, ValueError) as exc:
            return f"cannot open {path}: {exc}"
        self.opened_path = path
        return ""

    def _opened(self) -> None:
        now = self._wall()
        self._opens += 1
        self.board.set_state(CONNECTED)
        gaps: tuple[Gap, ...] = ()
        if self._gap_start is not None:
            gaps = (Gap(self._gap_start, now, self._gap_reason),)
            self._gap_start = None
            self.board.gap_ended(gaps[0])
        if self._opens > 1:
            self._new_segment()
        if self.wait_for_header:
            self._header_due = time.monotonic() + self.header_wait_s
        if gaps:
            self._sink(Batch([], now, gaps=gaps))

    def _new_segment(self) -> None:
        """A reconnect: the board's counter may have restarted; the last known clock goes on."""
        if isinstance(self.decoder, WireDecoder):
            self.decoder.new_segment()

    def _deliver(self, records: list[Record]) -> None:
        if self._header_due is not None and any(type(r) is Header for r in records):
            self._header_due = None
        if records:
            self.board.count(records)
            self._sink(Batch(records, self._wall()))
        else:
            self.board.data_arrived()

    def _unplugged(self, exc: BaseException) -> None:
        self._close()
        self._gap_start, self._gap_reason = self._wall(), f"unplugged: {type(exc).__name__}: {exc}"
        self.board.gap_started(self._gap_start, f"{type(exc).__name__}: {exc}")
        self.board.set_state(WAITING)
        self._header_due = None
        self._deliver_unfinished()

    def _deliver_unfinished(self) -> None:
        records = self.decoder.close()
        if records:
            self.board.count(records)
            self._sink(Batch(records, self._wall()))

    def _finish(self) -> None:
        self._deliver_unfinished()
        if self._gap_start is not None:
            now = self._wall()
            gap = Gap(self._gap_start, now, self._gap_reason + "; still open when reading stopped")
            self._gap_start = None
            self._sink(Batch([], now, gaps=(gap,)))

    def _lost(self, exc: BaseException) -> None:
        self.board.gap_started(self._wall(), None)  # a lost port is a gap from now on
        super()._lost(exc)

    def _close(self) -> None:
        port, self._port, self.opened_path = self._port, None, None
        if port is not None:
            try:
                port.close()
            except (serial.SerialException, OSError):
                pass
