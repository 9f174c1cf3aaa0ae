"""One reading of the bytes: the serial and the file path give the same records, and the bounds.

The same random streams, cut at random points, go through `SerialSource` (a
port that hands over exactly those pieces) and `FileTail` (a file written in
those pieces, polled after each); the records must be equal. Then the cases
that once differed or failed: a note holding the header tag, a header glued
to a line cut by a reset, lone CR line ends, and values that cannot be real.
"""

from __future__ import annotations

import threading
import time

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from drivers.mapping import parse_mapping
from drivers.config import ConfigError
from drivers.serial import SerialSource
from drivers.tail import FileTail
from drivers.wire import MAX_TIME_US, Event, Header, Malformed, WireDecoder, decode_all, encode_header

PIECES = st.sampled_from([
    b"# rigside-wire 1 clock=ms wrap=16\n", b"# rigside-wire 1 clock=us wrap=62\n", b"# rigside-wire",
    b"12 lever_down\n", b"65535 lever_up 2\n", b"40000 note a # rigside-wire 1 clock=ms\n",
    b"7 reward 30\r\n", b"8 reward 3e6\n", b"9 lick\r", b"\r", b"\n", b"\x00\xff", b"3 trial_start",
    b"# a comment\n", b"2305843009213693951 lick\n", b"garbage ", b"1 valve 1e999\n",
])


class PiecePort:
    """A serial port that hands the reader exactly the given pieces, one per read."""

    def __init__(self, pieces: list[bytes]) -> None:
        self.pieces = [p for p in pieces if p]
        self.lock = threading.Lock()
        self.current = b""

    def read(self, size: int = 1) -> bytes:
        with self.lock:
            if not self.current and self.pieces:
                self.current = self.pieces.pop(0)
            data, self.current = self.current[:size], self.current[size:]
        if not data:
            time.sleep(0.002)
        return data

    @property
    def in_waiting(self) -> int:
        return len(self.current)

    @property
    def drained(self) -> bool:
        with self.lock:
            return not self.pieces and not self.current

    def close(self) -> None:
        pass


def _cut(data: bytes, points: list[int]) -> list[bytes]:
    cuts = sorted({min(p, len(data)) for p in points} | {0, len(data)})
    return [data[a:b] for a, b in zip(cuts, cuts[1:])]


def through_serial(pieces: list[bytes]) -> list:
    port = PiecePort(pieces)
    records: list = []
    source = SerialSource("piece://", lambda batch: records.extend(batch.records), opener=lambda path: port,
                          wait_for_header=False)
    source.start()
    deadline = time.monotonic() + 20
    while not port.drained and time.monotonic() < deadline:
        time.sleep(0.005)
    time.sleep(0.05)
    source.stop()
    assert port.drained and source.failure is None
    return records


def through_file(pieces: list[bytes], path) -> list:
    records: list = []
    path.write_bytes(b"")
    tail = FileTail(path, lambda batch: records.extend(batch.records))
    for piece in pieces:
        with open(path, "ab") as fh:
            fh.write(piece)
        tail.poll()
    tail.poll()
    return records + tail.decoder.close()  # a file never ends: its last partial line is closed here


@settings(max_examples=40, deadline=None)
@given(st.lists(PIECES, max_size=30).map(b"".join), st.lists(st.integers(0, 600), max_size=12))
@pytest.mark.slow
def test_serial_and_file_paths_give_the_same_records(tmp_path_factory, data, points):
    pieces = _cut(data, points)
    from_file = through_file(pieces, tmp_path_factory.mktemp("f") / "log.rsw")
    from_serial = through_serial(pieces)
    assert from_serial == from_file
    assert from_file == decode_all(data)  # and both equal the whole stream decoded at once
    assert sum(r.size for r in from_file) == len(data)  # every byte accounted for (common practice: h11)


def test_a_note_holding_the_header_tag_is_one_note_on_both_paths(tmp_path):
    data = encode_header(clock="us") + b"100 note text # rigside-wire 1 clock=ms\n200 lick\n"
    for records in (through_serial([data[:30], data[30:70], data[70:]]), through_file([data], tmp_path / "a")):
        events = [r for r in records if isinstance(r, Event)]
        assert [e.name for e in events] == ["note", "lick"]
        assert events[0].args == ("text # rigside-wire 1 clock=ms",)
        assert events[1].t_us == 200  # still microseconds: the note's text changed no clock


def test_a_header_glued_to_a_cut_line_is_split_off_whatever_the_reads():
    data = b"1500 lever_d# rigside-wire 1 clock=ms\n5 lick\n"
    for cut in range(1, len(data)):
        decoder = WireDecoder()
        records = decoder.feed(data[:cut]) + decoder.feed(data[cut:]) + decoder.close()
        assert [type(r) for r in records] == [Malformed, Header, Event]
        assert records[0].raw == b"1500 lever_d" and records[2].t_us == 5000


def test_lone_cr_ends_a_line_and_a_final_cr_waits_for_a_possible_lf():
    data = b"1 lick\r2 lick\r\n3 lick\n4 lick\r"
    whole = decode_all(data)
    assert [r.raw_time for r in whole] == [1, 2, 3, 4]
    assert [r.size for r in whole] == [7, 8, 7, 7]
    decoder = WireDecoder()
    first = decoder.feed(b"1 lick\r")
    assert first == [] and decoder.pending == 7  # "\r" last: a "\n" may still follow
    assert [r.size for r in decoder.feed(b"\n")] == [8]


def test_an_unwrapped_time_past_the_bound_is_a_malformed_line_and_the_clock_stays():
    step = (1 << 61) - 1  # just under half of a 62-bit period: a forward step each time
    lines = [encode_header(wrap=62)] + [b"%d lick\n" % ((i * step) % (1 << 62)) for i in range(6)]
    records = decode_all(b"".join(lines))
    events = [r for r in records if isinstance(r, Event)]
    bad = [r for r in records if isinstance(r, Malformed)]
    assert bad and all("beyond 2^62" in r.reason for r in bad)
    assert all(abs(e.t_us) < MAX_TIME_US for e in events)
    assert all(-(1 << 63) <= e.t_us < (1 << 63) for e in events)  # fits SQLite's INTEGER (sqlite.org: datatype3)


@pytest.mark.parametrize("line", [b"5 reward 3e6\n", b"5 reward -1\n", b"5 valve 1e999\n", b"5 lever_down 70000\n",
                                  b"5 joystick 1e308\n"])
def test_values_that_cannot_be_real_are_malformed_lines(line):
    (record,) = decode_all(line)
    assert isinstance(record, Malformed) and "not a real value" in record.reason


@pytest.mark.parametrize("delimiter", ['"\\n"', '"\\r"'])
def test_a_line_end_as_field_delimiter_is_refused(delimiter):
    text = f'[format]\ndelimiter = {delimiter}\n[columns]\ndevice_time = 0\nevent = 1\n[clock]\nunit = "us"\n'
    with pytest.raises(ConfigError, match="delimiter"):
        parse_mapping(text, "lab.toml")
