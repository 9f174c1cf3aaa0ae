"""Live boxes on real pseudo-terminals: what a serial reader gets is exactly what the
box says it sent, across an unplug and re-plug behind a symlink; faults show as they should."""

import os
import threading
import time

import pytest
import serial

from drivers.serial import SerialSource
from drivers.wire import Event, Header, Malformed, WireDecoder
from mock_rig.history import cohort
from mock_rig.live import LiveRig
from mock_rig.outputs import PtyOutput, wait_until

pytestmark = pytest.mark.slow  # real pseudo-terminals with timed reads: about a second per test


def key(record):
    if isinstance(record, Event):
        return ("event", record.raw_time, record.name, record.args)
    return (type(record).__name__, getattr(record, "raw", None))


def sent_records(output: PtyOutput) -> list:
    decoder = WireDecoder()
    return [r for conn in output.sent for r in decoder.feed(b"".join(conn))]


class PyserialReader:
    """A small reader of our own: pyserial on the symlink, reopened after an unplug."""

    def __init__(self, path):
        self.path, self.records, self.errors = path, [], 0
        self.decoder = WireDecoder()
        self._stop = threading.Event()
        self.thread = threading.Thread(target=self.run, daemon=True)
        self.thread.start()

    def run(self):
        port = None
        while not self._stop.is_set():
            if port is None:
                try:
                    port = serial.Serial(str(self.path), 115200, timeout=0.05)
                except (serial.SerialException, OSError):
                    self._stop.wait(0.05)
                    continue
            try:  # read what is waiting (STACK-NOTES: keep our own buffer, never wait for a full read)
                data = port.read(1)
                if data and port.in_waiting:
                    data += port.read(port.in_waiting)
            except (serial.SerialException, OSError):
                self.errors += 1
                port.close()
                port = None
                continue
            self.records += self.decoder.feed(data)
        if port is not None:
            port.close()

    def stop(self):
        self._stop.set()
        self.thread.join(2)


def events_in(records):
    return sum(isinstance(r, Event) for r in records)


def run_with_unplug(tmp_path, reader_factory, get_records):
    animal = cohort(1, 11)[0]
    link = tmp_path / "box1"
    output = PtyOutput(link=link, record=True)
    rig = LiveRig(animal, output, speed=200).start()
    reader = reader_factory(link)
    try:
        assert wait_until(lambda: events_in(get_records(reader)) >= 150, 20)
        first_device = output.device
        rig.inject("unplug", 0.3)
        assert wait_until(lambda: len(output.sent) == 2 and output.plugged, 10)
        assert wait_until(lambda: len(output.sent[1]) > 100, 20)
        assert os.path.realpath(link) == output.device != first_device  # a NEW pty behind the link
        rig.stop()
        assert not link.exists()  # the box is gone: its link with it
        sent = sent_records(output)
        assert wait_until(lambda: len(get_records(reader)) >= len(sent), 10)
    finally:
        rig.stop()
        reader.stop()
    assert rig.error is None
    return output, sent, get_records(reader)


def test_pty_reader_gets_exactly_what_was_sent_across_unplug(tmp_path):
    output, sent, got = run_with_unplug(tmp_path, PyserialReader, lambda r: r.records)
    assert [key(r) for r in got] == [key(r) for r in sent]
    assert sum(isinstance(r, Header) for r in got) == 2  # boot, then boot after the re-plug
    assert not [r for r in got if isinstance(r, Malformed)]


def test_serial_source_gets_exactly_what_was_sent_across_unplug(tmp_path):
    class Source:
        def __init__(self, link):
            self.records = []
            self.gaps = []
            self.source = SerialSource(str(link), self.sink, retry_s=0.05)
            self.source.start()

        def sink(self, batch):
            self.records += batch.records
            self.gaps += batch.gaps

        def stop(self):
            self.source.stop()

    holder = {}

    def factory(link):
        holder["source"] = Source(link)
        return holder["source"]

    output, sent, got = run_with_unplug(tmp_path, factory, lambda r: r.records)
    assert [key(r) for r in got] == [key(r) for r in sent]
    closed = [g for g in holder["source"].gaps if "still open" not in g.reason]
    assert len(closed) == 1 and closed[0].reason.startswith("unplugged")  # the unplug, as a gap


def run_faults(tmp_path, *faults):
    output = PtyOutput(record=True)
    rig = LiveRig(cohort(1, 12)[0], output, speed=100).start()
    reader = PyserialReader(output.device)
    try:
        assert wait_until(lambda: events_in(reader.records) >= 20, 20)
        for kind, seconds in faults:
            rig.inject(kind, seconds)
        assert wait_until(lambda: len(rig.faults_applied) == len(faults), 10)
        count = events_in(reader.records)
        assert wait_until(lambda: events_in(reader.records) >= count + 30, 20)
        rig.stop()
        sent = sent_records(output)
        assert wait_until(lambda: len(reader.records) >= len(sent), 10)
    finally:
        rig.stop()
        reader.stop()
    assert [key(r) for r in reader.records] == [key(r) for r in sent]
    return reader.records


def test_garbage_lines_are_the_only_malformed_lines(tmp_path):
    got = run_faults(tmp_path, ("garbage", 3))
    assert sum(isinstance(r, Malformed) for r in got) == 3


def test_board_reset_sends_new_header_and_restarts_counter(tmp_path):
    got = run_faults(tmp_path, ("reset", None))
    headers = [i for i, r in enumerate(got) if isinstance(r, Header)]
    assert len(headers) == 2
    after = next(r for r in got[headers[1]:] if isinstance(r, Event))
    before = [r for r in got[: headers[1]] if isinstance(r, Event)][-1]
    assert after.raw_time < before.raw_time and after.segment == 2
    assert [r.name for r in got[headers[1] + 1 : headers[1] + 5]] == ["param"] * 4
    assert not [r for r in got if isinstance(r, Malformed)]


def test_burst_holds_output_then_sends_it_at_once(tmp_path):
    got = run_faults(tmp_path, ("burst", 0.5))
    assert not [r for r in got if isinstance(r, Malformed)]


def test_writes_never_block_without_a_reader():
    output = PtyOutput(wait_for_open=False, backlog_limit=64 * 1024)
    line = b"123 lick\n"
    started = time.monotonic()
    for _ in range(20000):  # 180 KB, far beyond what a pty holds unread
        output.write(line)
    assert output.lines_dropped > 0
    assert 0 < output.backlog_bytes <= 64 * 1024  # bounded; the kernel holds the rest
    output.close()
    assert time.monotonic() - started < 30  # generous bound: it returned at all


def test_box_waits_for_a_reader_before_booting():
    output = PtyOutput(record=True)
    rig = LiveRig(cohort(1, 13)[0], output, speed=100, drain_timeout=0.1).start()
    try:
        assert not output.ready() and output.sent == [[]]
        port = serial.Serial(output.device, 115200, timeout=0.05)
        assert wait_until(lambda: output.sent[0], 5)
        assert output.sent[0][0].startswith(b"# rigside-wire 1 ")
        port.close()
    finally:
        rig.stop()
