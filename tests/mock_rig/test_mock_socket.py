"""Live boxes on a local TCP port, read as pyserial's socket:// URL by the same SerialSource that
opens a COM port: what the reader gets is exactly what the box sent, across an unplug and re-plug,
with no pseudo-terminal anywhere (the path every platform has)."""

import time

import pytest
import serial

from drivers.serial import SerialSource
from drivers.wire import Event, Header, Malformed, WireDecoder
from mock_rig.history import cohort
from mock_rig.live import LiveRig, start_rigs, stop_rigs
from mock_rig.outputs import SocketOutput, wait_until


def key(record):
    if isinstance(record, Event):
        return ("event", record.raw_time, record.name, record.args)
    return (type(record).__name__, getattr(record, "raw", None))


def sent_records(output: SocketOutput) -> list:
    decoder = WireDecoder()
    return [r for conn in output.sent for r in decoder.feed(b"".join(conn))]


class Source:
    """The project's SerialSource on the box's URL, collecting what it delivers."""

    def __init__(self, url: str) -> None:
        self.records, self.gaps = [], []
        self.source = SerialSource(url, self.sink, retry_s=0.05)
        self.source.start()

    def sink(self, batch) -> None:
        self.records += batch.records
        self.gaps += batch.gaps

    def events(self) -> int:
        return sum(isinstance(r, Event) for r in self.records)


@pytest.mark.slow
def test_serial_source_on_socket_url_gets_exactly_what_was_sent_across_unplug():
    output = SocketOutput(record=True)
    assert output.url.startswith("socket://127.0.0.1:") and output.port > 0
    rig = LiveRig(cohort(1, 11)[0], output, speed=200).start()
    reader = Source(output.url)
    try:
        assert wait_until(lambda: reader.events() >= 150, 20)
        rig.inject("unplug", 0.3)
        assert wait_until(lambda: len(output.sent) == 2 and output.plugged, 10)
        assert wait_until(lambda: len(output.sent[1]) > 100, 20)
        assert output.device == output.url              # re-plugged on the same port, as a COM port keeps its name
        rig.stop()
        sent = sent_records(output)
        assert wait_until(lambda: len(reader.records) >= len(sent), 10)
    finally:
        rig.stop()
        reader.source.stop()
    assert rig.error is None
    # the reader is pyserial's own socket:// handler under our SerialSource (pyserial 3.5 URL handlers)
    assert [key(r) for r in reader.records] == [key(r) for r in sent]
    assert sum(isinstance(r, Header) for r in reader.records) == 2      # boot, and boot after the re-plug
    assert not [r for r in reader.records if isinstance(r, Malformed)]
    closed = [g for g in reader.gaps if "still open" not in g.reason]
    assert len(closed) == 1 and closed[0].reason.startswith("unplugged")


@pytest.mark.slow
def test_box_waits_for_a_reader_before_booting():
    output = SocketOutput(record=True)
    rig = LiveRig(cohort(1, 13)[0], output, speed=100, drain_timeout=0.1).start()
    try:
        time.sleep(0.3)
        assert not output.ready() and output.sent == [[]]
        port = serial.serial_for_url(output.url, timeout=0.05)   # pyserial's socket:// handler
        assert wait_until(lambda: output.sent[0], 5)
        assert output.sent[0][0].startswith(b"# rigside-wire 1 ")
        got = b""
        deadline = time.monotonic() + 5
        while b"\n" not in got and time.monotonic() < deadline:
            got += port.read(256)
        assert got.startswith(b"# rigside-wire 1 ")                 # the header reached the reader first
        port.close()
    finally:
        rig.stop()


def test_writes_never_block_without_a_reader():
    output = SocketOutput(wait_for_open=False, backlog_limit=64 * 1024)
    line = b"123 lick\n"
    for _ in range(20000):  # 180 KB with nobody connected
        output.write(line)
    assert output.lines_dropped > 0
    assert 0 < output.backlog_bytes <= 64 * 1024
    output.close()
    assert output.device is None


def test_start_rigs_via_socket_gives_each_box_its_own_url():
    rigs = start_rigs(cohort(2, 5), speed=50, via="socket")
    try:
        urls = [r.output.device for r in rigs]
        assert len(set(urls)) == 2 and all(u.startswith("socket://127.0.0.1:") for u in urls)
    finally:
        stop_rigs(rigs)
