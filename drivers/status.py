"""What a live source reports: batches of records, gaps, and its status as plain values.

Rule: a source (serial port or growing file) hands its consumer `Batch` values
only, from its reader thread, and keeps a `StatusBoard` that any thread may
read as an immutable `SourceStatus` snapshot. Nothing here knows Qt, the store
or the engine. A status is a word the app can show (`connected`, `waiting for
device`, `reading`, `silent`, `connection lost`, ...) plus counts of events and
malformed lines, the open gap if any, and the last error, kept as text.
Times are host wall-clock seconds (`time.time()`), so gaps mean something
after a restart; "silent" is judged on the monotonic clock.
"""

from __future__ import annotations

import threading
import time
from typing import Any, Callable, NamedTuple

from drivers.wire import Event, Malformed, Record

# State words, shown as they are.
STARTING = "starting"
WAITING = "waiting for device"  # serial: port absent or not openable; file: path absent
CONNECTED = "connected"  # open, nothing received since
READING = "reading"  # data arrived within `silent_after_s`
SILENT = "silent"  # open, but nothing for `silent_after_s` or more
LOST = "connection lost"  # the reader ended on an unexpected error
STOPPED = "stopped"


class Gap(NamedTuple):
    """A span during which a source could not deliver data (host wall seconds)."""

    start: float
    end: float
    reason: str


class FilePosition(NamedTuple):
    """Where a file source resumes after the records of the batch that carries it.

    `offset` is the byte offset of the first byte not yet in a record;
    `identity` is (st_dev, st_ino) of the file; `fingerprint` is a hash of the
    file's first `prefix_len` bytes and of the `prefix_len` bytes before
    `offset` (how a restart recognises the same file);
    `decoder` is the decoder's JSON-able state (`LineDecoder.state()`).
    """

    offset: int
    identity: tuple[int, int]
    fingerprint: str
    prefix_len: int
    decoder: dict[str, Any]


class Batch(NamedTuple):
    """Records read together, with the host time they arrived."""

    records: list[Record]
    received: float  # host wall seconds
    resume: FilePosition | None = None  # file sources: position after these records
    gaps: tuple[Gap, ...] = ()  # gaps that ended just before these records
    notices: tuple[str, ...] = ()  # e.g. "file truncated: reading again from byte 0"


BatchSink = Callable[[Batch], None]


class SourceStatus(NamedTuple):
    """One snapshot of a source's state, for display."""

    state: str
    events: int
    malformed: int
    other_lines: int  # headers and comments
    silent_s: float | None  # seconds since data last arrived, while open
    gap_since: float | None  # host wall time the open gap started, if disconnected
    gaps: int  # gaps closed so far
    last_gap: Gap | None  # the most recent closed gap
    last_error: str | None
    last_notice: str | None

    @property
    def text(self) -> str:
        """The state as one short phrase, e.g. 'silent for 12 s'."""
        if self.state == SILENT and self.silent_s is not None:
            return f"silent for {self.silent_s:.0f} s"
        if self.state == LOST and self.last_error:
            return f"{LOST}: {self.last_error}"
        if self.state == WAITING and self.gap_since is not None:
            return f"{WAITING} (gap since {time.strftime('%H:%M:%S', time.localtime(self.gap_since))})"
        return self.state


class StatusBoard:
    """Thread-safe counters and state of one source; `snapshot()` reads them."""

    def __init__(self, silent_after_s: float = 5.0, clock: Callable[[], float] = time.monotonic) -> None:
        self.silent_after_s = silent_after_s
        self._clock = clock
        self._lock = threading.Lock()
        self._state = STARTING
        self._events = self._malformed = self._other = 0
        self._gaps = 0
        self._last_data: float | None = None
        self._gap_since: float | None = None
        self._last_gap: Gap | None = None
        self._last_error: str | None = None
        self._last_notice: str | None = None

    def set_state(self, state: str) -> None:
        with self._lock:
            self._state = state
            if state == CONNECTED:
                self._last_data = self._clock()

    def count(self, records: list[Record]) -> None:
        """Count a batch of records and mark data as just received."""
        events = malformed = 0
        for record in records:
            if isinstance(record, Event):
                events += 1
            elif isinstance(record, Malformed):
                malformed += 1
        with self._lock:
            self._events += events
            self._malformed += malformed
            self._other += len(records) - events - malformed
            self._mark_data()

    def data_arrived(self) -> None:
        with self._lock:
            self._mark_data()

    def _mark_data(self) -> None:
        self._last_data = self._clock()
        if self._state in (CONNECTED, SILENT):
            self._state = READING

    def gap_started(self, when: float, error: str | None) -> None:
        with self._lock:
            if self._gap_since is None:
                self._gap_since = when
            if error:
                self._last_error = error

    def gap_ended(self, gap: Gap) -> None:
        with self._lock:
            self._gap_since = None
            self._last_gap = gap
            self._gaps += 1

    def error(self, text: str) -> None:
        with self._lock:
            self._last_error = text

    def notice(self, text: str) -> None:
        with self._lock:
            self._last_notice = text

    def snapshot(self) -> SourceStatus:
        with self._lock:
            state = self._state
            silent_s = None
            if self._last_data is not None and state in (CONNECTED, READING, SILENT):
                silent_s = max(0.0, self._clock() - self._last_data)
                if silent_s >= self.silent_after_s:
                    state = SILENT
                elif state == SILENT:
                    state = READING
            return SourceStatus(
                state, self._events, self._malformed, self._other, silent_s,
                self._gap_since, self._gaps, self._last_gap, self._last_error,
                self._last_notice,
            )
