"""drivers.tail: a growing file read line by line, exactly once, through appends, rotation, truncation, restarts."""

from __future__ import annotations

import os
from pathlib import Path

import pytest

from drivers.mapping import MappedDecoder, parse_mapping
from drivers.status import LOST, READING, Batch
from drivers.tail import FileTail, position_after
from drivers.wire import Event, Malformed, WireDecoder, decode_all, encode_event, encode_header
from fixtures.sessions import wait_for


class Collect:
    def __init__(self) -> None:
        self.batches: list[Batch] = []

    def __call__(self, batch: Batch) -> None:
        self.batches.append(batch)

    @property
    def records(self):
        return [r for b in self.batches for r in b.records]

    @property
    def events(self) -> list[Event]:
        return [r for r in self.records if isinstance(r, Event)]


def wire_lines(n: int, start: int = 0, step: int = 997, wrap: int = 32) -> bytes:
    names = ("lever_down", "lever_up", "lick", "trial_start")
    return b"".join(encode_event((start + i * step) % (1 << wrap), names[i % 4]) for i in range(n))


def append(path: Path, data: bytes) -> None:
    with open(path, "ab") as fh:
        fh.write(data)


def key(events):
    return [(e.line, e.raw_time, e.t_us, e.name, e.segment) for e in events]


def test_odd_sized_appends_give_every_line_once_in_order(tmp_path):
    path = tmp_path / "box.rsw"
    data = encode_header(fw="t") + wire_lines(300)
    path.write_bytes(b"")
    sink = Collect()
    tail = FileTail(path, sink)
    at, sizes = 0, [1, 7, 13, 2, 101, 3, 64]
    i = 0
    while at < len(data):
        size = sizes[i % len(sizes)]
        append(path, data[at:at + size])
        at += size
        i += 1
        tail.poll()
    # the reference: the same bytes decoded in one go
    assert sink.records == decode_all(data)
    assert len(sink.events) == 300


def test_partial_last_line_waits_until_completed(tmp_path):
    path = tmp_path / "box.rsw"
    path.write_bytes(b"100 lever_down\n200 lev")
    sink = Collect()
    tail = FileTail(path, sink)
    tail.poll()
    assert [e.raw_time for e in sink.events] == [100]
    assert tail.position.offset == len(b"100 lever_down\n")  # the partial line is not consumed
    tail.poll()
    assert len(sink.records) == 1
    append(path, b"er_up\n")
    tail.poll()
    assert [(e.raw_time, e.name) for e in sink.events] == [(100, "lever_down"), (200, "lever_up")]


def test_file_existing_before_the_reader_started_is_read_from_byte_0(tmp_path):
    path = tmp_path / "box.rsw"
    data = encode_header() + wire_lines(50)
    path.write_bytes(data)
    sink = Collect()
    FileTail(path, sink).poll()
    assert sink.records == decode_all(data)


def test_rotation_drains_the_old_file_then_follows_the_new_one_from_0(tmp_path):
    path = tmp_path / "box.rsw"
    first = encode_header() + wire_lines(20)
    path.write_bytes(first)
    sink = Collect()
    tail = FileTail(path, sink)
    tail.poll()
    late = wire_lines(5, start=10_000_000)
    append(path, late + b"777 lick_par")  # written just before rotation, unfinished last line
    os.rename(path, tmp_path / "box.rsw.1")
    second = encode_header(fw="new") + wire_lines(10, start=5)
    path.write_bytes(second)
    tail.poll()  # drains the old handle
    tail.poll()  # opens the new file
    old_events = [r for r in decode_all(first + late) if isinstance(r, Event)]
    new_events = [r for r in decode_all(second) if isinstance(r, Event)]
    got = sink.events
    assert [(e.raw_time, e.name) for e in got] == [(e.raw_time, e.name) for e in old_events + new_events]
    cut = [r for r in sink.records if isinstance(r, Malformed)]
    assert len(cut) == 1 and cut[0].raw == b"777 lick_par" and "unterminated" in cut[0].reason
    assert got[-1].segment > got[len(old_events) - 1].segment  # the new file is a new clock segment
    assert any("rotated" in n for b in sink.batches for n in b.notices)


def test_truncation_starts_again_at_0_and_is_reported(tmp_path):
    path = tmp_path / "box.rsw"
    path.write_bytes(encode_header() + wire_lines(30))
    sink = Collect()
    tail = FileTail(path, sink)
    tail.poll()
    with open(path, "r+b") as fh:
        fh.truncate(0)
    fresh = encode_header() + wire_lines(3, start=42)
    append(path, fresh)
    tail.poll()
    assert [e.raw_time for e in sink.events[30:]] == [42, 42 + 997, 42 + 2 * 997]
    assert any("truncated" in n for b in sink.batches for n in b.notices)
    assert tail.position.offset == len(fresh)
    assert "truncated" in tail.status().last_notice


@pytest.mark.parametrize("cut_after", [1, 57, 200])
def test_restart_from_a_stored_position_keeps_lines_and_unwrap_state(tmp_path, cut_after):
    # a 16-bit millisecond counter that wraps several times: the unwrap state must survive the restart
    path = tmp_path / "box.rsw"
    data = encode_header(clock="ms", wrap=16) + wire_lines(400, start=60_000, step=700, wrap=16)
    lines = data.splitlines(keepends=True)
    head = b"".join(lines[:cut_after]) + lines[cut_after][:5]  # ends in a partial line
    path.write_bytes(head)
    first = Collect()
    FileTail(path, first).poll()
    stored = first.batches[-1].resume
    assert stored.offset == len(b"".join(lines[:cut_after]))
    append(path, data[len(head):])
    second = Collect()
    FileTail(path, second, resume=stored).poll()
    assert first.records + second.records == decode_all(data)  # the reference: one pass over the whole file


def test_restart_on_a_different_file_reads_it_from_0(tmp_path):
    path = tmp_path / "box.rsw"
    path.write_bytes(encode_header(fw="a") + wire_lines(10))
    first = Collect()
    FileTail(path, first).poll()
    stored = first.batches[-1].resume
    other = encode_header(fw="b") + wire_lines(12, start=3)
    path.write_bytes(other)
    second = Collect()
    FileTail(path, second, resume=stored).poll()
    assert [r._replace(segment=0) for r in second.records] == [r._replace(segment=0) for r in decode_all(other)]
    assert min(r.segment for r in second.events) > max(r.segment for r in first.events)
    assert "differs" in second.batches[0].notices[0]


MAPPING = """
[format]
delimiter = ";"
header = true
[columns]
device_time = "ctr"
event = "code"
value = "arg"
animal = "who"
[clock]
unit = "us"
wrap_bits = 16
[events]
LP = "lever_down"
RW = "reward"
"""


def test_mapped_file_restart_keeps_header_columns_and_per_animal_clocks(tmp_path):
    mapping = parse_mapping(MAPPING, "m.toml")
    rows = ["who;ctr;code;arg\n"] + [f"{'ab'[i % 2]};{(i * 9000) % 65536};{'LP' if i % 3 else 'RW'};{i % 3 or 5}\n"
                                     for i in range(60)]
    data = "".join(rows).encode()
    path = tmp_path / "lab.csv"
    path.write_bytes(data[:400])
    first = Collect()
    FileTail(path, first, decoder_factory=lambda: MappedDecoder(mapping)).poll()
    append(path, data[400:])
    second = Collect()
    FileTail(path, second, decoder_factory=lambda: MappedDecoder(mapping), resume=first.batches[-1].resume).poll()
    whole = MappedDecoder(mapping)
    reference = whole.feed(data)
    assert first.records + second.records == reference
    assert {e.animal for e in second.events} == {"a", "b"}


def test_thread_follows_growth_and_reports_reading(tmp_path):
    path = tmp_path / "box.rsw"
    path.write_bytes(encode_header())
    sink = Collect()
    tail = FileTail(path, sink, poll_s=0.1)
    tail.start()
    try:
        for i in range(5):
            append(path, wire_lines(10, start=i * 100_000))
            wait_for(lambda: len(sink.events) == (i + 1) * 10, what=f"batch {i}")
        assert tail.status().state == READING and tail.status().events == 50
    finally:
        tail.stop()
    assert not tail.alive


def test_pause_holds_reading_until_released(tmp_path):
    path = tmp_path / "box.rsw"
    path.write_bytes(wire_lines(5))
    asked = []
    paused = [True]

    def should_pause() -> bool:
        asked.append(1)
        return paused[0]

    sink = Collect()
    tail = FileTail(path, sink, poll_s=0.02, should_pause=should_pause)
    tail.start()
    try:
        wait_for(lambda: len(asked) >= 3, what="three paused polls")
        assert sink.events == []
        paused[0] = False
        wait_for(lambda: len(sink.events) == 5, what="events after release")
    finally:
        tail.stop()


def test_an_exception_in_the_sink_surfaces_as_connection_lost(tmp_path):
    path = tmp_path / "box.rsw"
    path.write_bytes(wire_lines(3))
    lost = []

    def broken(batch):
        raise RuntimeError("engine fell over")

    tail = FileTail(path, broken, poll_s=0.05, on_lost=lost.append)
    tail.start()
    wait_for(lambda: not tail.alive, what="reader to end")
    status = tail.status()
    assert status.state == LOST
    assert status.text.startswith("connection lost") and "engine fell over" in status.text
    assert isinstance(lost[0], RuntimeError)


def test_a_failing_lost_handler_is_a_notice_and_the_first_error_stays(tmp_path):
    # the reader thread's ending is shared with the serial source (drivers/reader.py)
    path = tmp_path / "box.rsw"
    path.write_bytes(wire_lines(3))

    def broken(batch):
        raise RuntimeError("engine fell over")

    def handler(exc):
        raise ValueError("handler fell over too")

    tail = FileTail(path, broken, poll_s=0.05, on_lost=handler)
    tail.start()
    wait_for(lambda: not tail.alive, what="reader to end")
    status = tail.status()
    assert status.state == LOST and "engine fell over" in status.text
    assert isinstance(tail.failure, RuntimeError) and "handler fell over too" in status.last_notice


def test_missing_file_waits_then_is_read_when_it_appears(tmp_path):
    path = tmp_path / "later.rsw"
    sink = Collect()
    tail = FileTail(path, sink)
    assert tail.poll() is False and tail.status().state == "waiting for device"
    path.write_bytes(wire_lines(4))
    tail.poll()
    assert len(sink.events) == 4


def test_atomic_replace_with_the_same_content_goes_on_without_doubling(tmp_path):
    path = tmp_path / "box.rsw"
    data = encode_header() + wire_lines(80)
    path.write_bytes(data[:700])
    sink = Collect()
    tail = FileTail(path, sink)
    tail.poll()
    staged = tmp_path / "box.rsw.tmp"  # a logger that rewrites the whole file and renames it into place
    staged.write_bytes(data)
    os.replace(staged, path)
    tail.poll()  # notices the new inode
    tail.poll()  # reads on from where it was
    assert sink.records == decode_all(data)
    assert any("same content" in n for b in sink.batches for n in b.notices)


def test_a_new_file_that_only_starts_like_the_old_one_is_read_from_0(tmp_path):
    path = tmp_path / "box.rsw"
    common = encode_header(fw="same") + wire_lines(100)  # more than the fingerprint's first 1024 bytes
    assert len(common) > 1024
    old = common + wire_lines(20, start=1_000_000)
    path.write_bytes(old)
    first = Collect()
    FileTail(path, first).poll()
    new = common + wire_lines(40, start=2_000_000)  # same beginning, different after: another session
    path.write_bytes(new)
    second = Collect()
    FileTail(path, second, resume=first.batches[-1].resume).poll()
    assert [r._replace(segment=0) for r in second.records] == [r._replace(segment=0) for r in decode_all(new)]


def _mapped_rows() -> bytes:
    return "".join(["who;ctr;code;arg\n"] + [f"{'ab'[i % 2]};{(i * 9000) % 65536};{'LP' if i % 3 else 'RW'};{i % 3 or 5}\n"
                                           for i in range(30)]).encode()


@pytest.mark.parametrize("dialect,newline", [("wire", b"\n"), ("wire", b"\r\n"), ("mapped", b"\r\n")])
def test_following_after_a_whole_read_of_any_prefix_gives_every_line_once(tmp_path, dialect, newline):
    """A file read whole (an import) while its writer was mid-line, at every byte, then followed from
    `position_after`: the whole read's records and the follower's are the file's, each once, with the same
    line numbers, segments and unwrapped clocks (16-bit clocks that wrap on the way); only the unterminated
    line the whole read kept as malformed is read again, whole."""
    if dialect == "wire":
        data, factory = encode_header(fw="t") + wire_lines(40, step=9001, wrap=16), WireDecoder
    else:
        mapping = parse_mapping(MAPPING, "m.toml")
        data, factory = _mapped_rows(), lambda: MappedDecoder(mapping)
    data = data.replace(b"\n", newline)
    path = tmp_path / "box.rsw"
    path.write_bytes(data)

    def good(records):  # a line the whole read ended at a lone CR is one byte shorter there: sizes aside
        return [r._replace(size=0) for r in records if not isinstance(r, Malformed)]

    whole = factory()
    expected = good(whole.feed(data) + whole.close())
    for stored in range(1, len(data) + 1):
        decoder = factory()
        read = good(decoder.feed(data[:stored]) + decoder.close())
        sink = Collect()  # no complete line stored: followed from byte 0
        FileTail(path, sink, decoder_factory=factory, resume=position_after(path, stored, factory)).poll()
        assert read + good(sink.records) == expected, stored
