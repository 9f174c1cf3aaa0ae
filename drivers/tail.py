"""File source: follow a growing file from a saved byte offset, line by line, exactly once.

Rule: the file is the truth and the reader only ever moves forward through
complete lines. Every `poll_s` (100-250 ms) it reads binary from where it
stopped and feeds the line decoder (`WireDecoder` or `MappedDecoder`); a
partial last line waits in the decoder and is read again after a restart,
because each `Batch` carries the `FilePosition` just past its last complete
line together with the decoder's state — the store commits both with the
batch's records, so a restart resumes exactly once. Rotation (the path's
st_dev/st_ino changes, or the path disappears): the old handle is drained to
its end, its unfinished last line is kept as a malformed record, and the new
file is followed from byte 0. Truncation (size below the read position): read
again from byte 0, with a notice. A restart recognises "the same file" by a
hash of its first bytes and of the bytes just before the offset (st_ino can
be 0 on Windows); a different file at the
path is read from byte 0, with a notice. I/O errors close the handle and
reopen at the last position (state "waiting for device"); any other
exception, the sink's included, ends the reader as "connection lost".
"""

from __future__ import annotations

import hashlib
import os
import time
from typing import BinaryIO, Callable

from drivers.reader import ReaderThread
from drivers.status import CONNECTED, WAITING, Batch, BatchSink, FilePosition, StatusBoard
from drivers.wire import LineDecoder, Malformed, Record, WireDecoder

POLL_S = 0.2
CHUNK = 1 << 20  # bytes read per batch at most
FINGERPRINT_LEN = 1024  # bytes at the start of a file that identify it across restarts

DecoderFactory = Callable[[], LineDecoder]


def file_fingerprint(fh: BinaryIO, offset: int, span: int | None = None) -> tuple[str, int]:
    """sha256 of a file's first `span` bytes and the `span` bytes before `offset`; (hash, span).

    Both ends: a new file that merely starts like the old one (the same header
    lines) differs just before the offset.
    """
    span = min(FINGERPRINT_LEN, offset) if span is None else span
    here = fh.tell()
    fh.seek(0)
    head = fh.read(span)
    fh.seek(offset - span)
    tail = fh.read(span)
    fh.seek(here)
    return hashlib.sha256(head + tail).hexdigest(), span


def position_after(path: str | os.PathLike[str], stored: int, decoder_factory: DecoderFactory) -> FilePosition | None:
    """Where to follow a file whose first `stored` bytes were read whole (by an import) before; None when
    they hold no complete line.

    Their lines are decoded and dropped, as that read did: the reader starts after its last complete line,
    or after a last line it took as complete (ended by a lone CR, which a whole read decodes; the LF that
    completes that CR, when written, is skipped); an unterminated last line, which that read kept as
    malformed, is read again whole.
    """
    with open(path, "rb") as fh:
        data = fh.read(stored + 1)
        if len(data) < stored:
            return None
        decoder = decoder_factory()
        decoder.feed(data[:stored])
        state = decoder.state()
        if any(type(record) is not Malformed for record in decoder.close()):
            state = decoder.state()
            if data[stored:] == b"\n":
                state = {**state, "offset": stored + 1}
        if state["offset"] == 0:
            return None
        fingerprint, span = file_fingerprint(fh, state["offset"])
        st = os.fstat(fh.fileno())
        return FilePosition(state["offset"], (st.st_dev, st.st_ino), fingerprint, span, state)


class FileTail(ReaderThread):
    """Follows one file; `poll()` does one step (tests), `start()` runs it in a thread (drivers/reader.py)."""

    stop_timeout_s = 5.0

    def __init__(
        self,
        path: str | os.PathLike[str],
        sink: BatchSink,
        *,
        decoder_factory: DecoderFactory = WireDecoder,
        resume: FilePosition | None = None,
        resume_notice: str | None = None,
        poll_s: float = POLL_S,
        silent_after_s: float = 5.0,
        should_pause: Callable[[], bool] | None = None,
        on_lost: Callable[[BaseException], None] | None = None,
        wall_clock: Callable[[], float] = time.time,
    ) -> None:
        super().__init__(f"tail {os.fspath(path)}", StatusBoard(silent_after_s), on_lost)
        self.path = os.fspath(path)
        self.poll_s = poll_s
        self.should_pause = should_pause
        self.decoder: LineDecoder = decoder_factory()
        self._factory = decoder_factory
        self._sink = sink
        self._wall = wall_clock
        self._resume = resume
        self._resume_notice = resume_notice  # said when the file opens where `resume` left it
        self._fh: BinaryIO | None = None
        self._identity = (0, 0)
        self._read_pos = 0
        self._print: tuple[int, str, int] | None = None  # (offset, fingerprint, span) last computed
        self._last_position: FilePosition | None = resume
        self._notices: list[str] = []
        self._ever_opened = False

    # --- control -----------------------------------------------------------

    @property
    def ever_opened(self) -> bool:
        """Was the file opened at least once?"""
        return self._ever_opened

    @property
    def position(self) -> FilePosition:
        """Where a restart would resume now (needs the file open)."""
        offset = self.decoder.offset
        if self._print is None or self._print[0] != offset:
            assert self._fh is not None
            self._print = (offset, *file_fingerprint(self._fh, offset))
        _, print_, span = self._print
        return FilePosition(offset, self._identity, print_, span, self.decoder.state())

    def _loop(self) -> None:
        while not self._stop.is_set():
            if self.should_pause is None or not self.should_pause():
                self.poll()
            self._stop.wait(self.poll_s)

    def _finish(self) -> None:
        """One last poll: what is complete now is delivered."""
        self.poll()

    # --- one poll ----------------------------------------------------------

    def poll(self) -> bool:
        """Read what is new; return whether any record was delivered."""
        try:
            if self._fh is None and not self._open():
                return False
            return self._read_new()
        except OSError as exc:
            self._close()
            self._resume = self._last_position  # reopen where the last delivered batch ended
            self.decoder = self._factory()
            self.board.error(f"{type(exc).__name__}: {exc}")
            self.board.set_state(WAITING)
            return False

    def _open(self) -> bool:
        try:
            fh = open(self.path, "rb")  # noqa: SIM115 - kept open while following
        except FileNotFoundError:
            self.board.set_state(WAITING)
            return False
        st = os.fstat(fh.fileno())
        self._fh, self._identity, self._print = fh, (st.st_dev, st.st_ino), None
        self._ever_opened = True
        resume, self._resume = self._resume, None
        notice, self._resume_notice = self._resume_notice, None
        start = 0
        if resume is not None:
            if self._continues(fh, st.st_size, resume):
                self.decoder.restore(resume.decoder)
                start = resume.offset
                if notice:
                    self._notify(notice)
            else:
                self.decoder.restore(resume.decoder)  # so that segment numbers go on rising
                self._renew_decoder()
                self._notify("the file differs from the one read before: reading it from byte 0")
        fh.seek(start)
        self._read_pos = start
        self._last_position = self.position
        self.board.set_state(CONNECTED)
        return True

    @staticmethod
    def _continues(fh: BinaryIO, size: int, pos: FilePosition) -> bool:
        """Does this file hold, up to `pos.offset`, the bytes that `pos` was taken from?"""
        return size >= pos.offset and file_fingerprint(fh, pos.offset, pos.prefix_len)[0] == pos.fingerprint

    def _read_new(self) -> bool:
        assert self._fh is not None
        try:
            st = os.stat(self.path)
            rotated = (st.st_dev, st.st_ino) != self._identity
        except FileNotFoundError:
            rotated = True
        if not rotated and os.fstat(self._fh.fileno()).st_size < self._read_pos:
            self._truncated()
        delivered = False
        while True:  # to the end now: a rotated file is drained, a big backlog read in chunks
            data = self._fh.read(CHUNK)
            if not data:
                break
            self._read_pos += len(data)
            delivered |= self._deliver(self.decoder.feed(data))
            if not rotated and self.should_pause is not None and self.should_pause():
                break
        if rotated:
            delivered |= self._rotated()
        elif not delivered:
            self._flush_notices()
        return delivered

    def _rotated(self) -> bool:
        """The path names another file now; the old one has been read to its end."""
        last = self.position
        if self._path_continues(last):  # replaced by a copy that goes on from here
            self._close()
            self.decoder, self._resume = self._factory(), last
            self._notify(f"file replaced by one with the same content: going on from byte {last.offset}")
            return False
        delivered = self._deliver(self.decoder.close())
        self._close()
        self._renew_decoder()
        self._notify("file rotated: following the new file from byte 0")
        return delivered

    def _path_continues(self, pos: FilePosition) -> bool:
        try:
            with open(self.path, "rb") as fh:
                return self._continues(fh, os.fstat(fh.fileno()).st_size, pos)
        except FileNotFoundError:
            return False

    def _truncated(self) -> None:
        assert self._fh is not None
        self._deliver(self.decoder.close())
        self._notify(f"file truncated below byte {self._read_pos}: reading again from byte 0")
        self._renew_decoder()
        self._fh.seek(0)
        self._read_pos = 0

    def _renew_decoder(self) -> None:
        """A new file (rotation, truncation): fresh line count and clock, segments go on rising."""
        old, self.decoder = self.decoder, self._factory()
        if isinstance(old, WireDecoder) and isinstance(self.decoder, WireDecoder):
            self.decoder.segment = old.segment + 1

    def _notify(self, text: str) -> None:
        self._notices.append(text)
        self.board.notice(text)

    def _deliver(self, records: list[Record]) -> bool:
        if not records:
            return False
        self.board.count(records)
        notices, self._notices = tuple(self._notices), []
        self._last_position = self.position
        self._sink(Batch(records, self._wall(), resume=self._last_position, notices=notices))
        return True

    def _flush_notices(self) -> None:
        if self._notices and self._fh is not None:
            notices, self._notices = tuple(self._notices), []
            self._last_position = self.position
            self._sink(Batch([], self._wall(), resume=self._last_position, notices=notices))

    def _close(self) -> None:
        fh, self._fh = self._fh, None
        if fh is not None:
            fh.close()
