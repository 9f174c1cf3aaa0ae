"""drivers.serial on real pseudo-terminals and on pyserial's loop:// — never hardware.

A pty is a real serial device to pyserial; closing its master is a realistic
unplug (STACK-NOTES.md). Bytes still unread when the master closes are lost,
so every test waits for the reader to drain before it unplugs, and writes
with a timeout (a pty master blocks once ~17 KB are unread).
"""

from __future__ import annotations

import os
import threading
import time

import pytest
import serial
from serial.tools.list_ports_common import ListPortInfo

import drivers.serial as source_mod
from drivers.serial import SerialSource, find_by_serial_number, list_serial_ports, open_port
from drivers.status import CONNECTED, LOST, SILENT, WAITING, Batch
from drivers.wire import Event, Header, Malformed, encode_event, encode_header
from fixtures.devices import PtyBoard
from fixtures.sessions import wait_for

pytestmark = pytest.mark.skipif(os.name != "posix", reason="pseudo-terminals are POSIX")


class Collect:
    def __init__(self) -> None:
        self.batches: list[Batch] = []
        self.lock = threading.Lock()

    def __call__(self, batch: Batch) -> None:
        with self.lock:
            self.batches.append(batch)

    @property
    def records(self):
        with self.lock:
            return [r for b in self.batches for r in b.records]

    @property
    def events(self) -> list[Event]:
        return [r for r in self.records if isinstance(r, Event)]

    @property
    def gaps(self):
        with self.lock:
            return [g for b in self.batches for g in b.gaps]


def lines(n: int, start: int = 1000) -> bytes:
    return b"".join(encode_event(start + 250 * i, "lever_down" if i % 2 == 0 else "lever_up") for i in range(n))


def running(source: SerialSource):
    source.start()
    return source


def opened(dev: PtyBoard, **options) -> tuple[Collect, SerialSource]:
    """A running source on `dev` with a collecting sink, once it has opened the port."""
    sink = Collect()
    source = running(SerialSource(dev.name, sink, **options))
    try:
        wait_for(lambda: source.status().state == CONNECTED, what="open")
    except AssertionError:
        source.stop()
        raise
    return sink, source


def test_loop_url_header_tag_split_across_reads_and_boot_noise_kept():
    port = serial.serial_for_url("loop://", timeout=0.05)  # pyserial's own loopback handler
    sink = Collect()
    source = running(SerialSource("loop://", sink, opener=lambda path: port))
    try:
        wait_for(lambda: source.status().state == CONNECTED, what="open")
        port.write(b"\x00\xffboot noise 12 lev")  # what a resetting board sends before its header
        port.write(encode_header(fw="loop")[:9])  # the header's tag cut in two reads
        wait_for(lambda: source.decoder.pending > 20, what="the first part read")
        port.write(encode_header(fw="loop")[9:] + lines(3)[:20])
        wait_for(lambda: len(sink.events) >= 1, what="first event")
        port.write(lines(3)[20:])
        wait_for(lambda: len(sink.events) == 3, what="three events")
    finally:
        source.stop()
    noise, header = sink.records[:2]
    assert isinstance(noise, Malformed) and noise.raw == b"\x00\xffboot noise 12 lev"  # kept, not dropped
    assert isinstance(header, Header) and header.fields["fw"] == "loop"
    assert [e.raw_time for e in sink.events] == [1000, 1250, 1500]
    assert source.status().malformed == 1


def test_pty_line_split_across_reads(boards):
    dev = boards()
    sink, source = opened(dev, wait_for_header=False)
    try:
        dev.write(b"5000 lever_")
        wait_for(lambda: source.decoder.pending == len(b"5000 lever_"), what="half a line read")
        assert sink.events == []
        dev.write(b"down 2\n5100 lever_up 2\n")
        wait_for(lambda: len(sink.events) == 2, what="two events")
    finally:
        source.stop()
    assert [(e.raw_time, e.name, e.args) for e in sink.events] == [(5000, "lever_down", ("2",)), (5100, "lever_up", ("2",))]


def test_unplug_and_replug_under_a_new_name_behind_the_same_symlink(boards, tmp_path):
    link = tmp_path / "usb-rig3-if00"
    first = boards()
    os.symlink(first.name, link)
    sink = Collect()
    source = running(SerialSource(str(link), sink, retry_s=0.05))
    try:
        wait_for(lambda: source.status().state == CONNECTED, what="first open")
        first.write(encode_header(fw="a") + lines(4))
        wait_for(lambda: len(sink.events) == 4, what="drained before unplug")
        second = boards()  # made now so that it gets another tty name, as a re-plugged board can
        first.unplug()
        wait_for(lambda: source.status().state == WAITING, what="unplug noticed")
        assert source.status().last_error.startswith(("SerialException", "OSError"))  # per STACK-NOTES.md
        assert second.name != first.name
        tmp = tmp_path / "new-link"
        os.symlink(second.name, tmp)
        os.replace(tmp, link)
        replugged = time.monotonic()
        wait_for(lambda: source.status().state == CONNECTED, timeout=2.0, what="reconnect within 2 s")
        reconnect_s = time.monotonic() - replugged
        second.write(encode_header(fw="b") + lines(3, start=10))
        wait_for(lambda: len(sink.events) == 7, what="events after re-plug")
    finally:
        source.stop()
    print(f"reconnect after re-plug: {reconnect_s * 1000:.0f} ms")
    gaps = sink.gaps
    assert len(gaps) == 1 and gaps[0].start < gaps[0].end and "unplugged" in gaps[0].reason
    assert source.status().gaps == 1 and source.status().last_gap == gaps[0]
    before, after = sink.events[:4], sink.events[4:]
    assert {e.segment for e in before} == {1} and {e.segment for e in after} == {2}
    assert [e.raw_time for e in after] == [10, 260, 510]


def test_board_reset_mid_stream_starts_a_new_segment(boards):
    dev = boards()
    sink, source = opened(dev)
    try:
        dev.write(encode_header() + lines(3, start=4_000_000))
        wait_for(lambda: len(sink.events) == 3, what="first segment")
        dev.write(b"4000900 lever_d")  # the reset cuts this line short...
        wait_for(lambda: source.decoder.pending > 0, what="cut line read")
        dev.write(encode_header(fw="rebooted") + lines(2, start=0))  # ...and the board starts again from 0
        wait_for(lambda: len(sink.events) == 5, what="second segment")
    finally:
        source.stop()
    first, second = sink.events[:3], sink.events[3:]
    assert {e.segment for e in first} == {1} and {e.segment for e in second} == {2}
    assert [e.t_us for e in second] == [0, 250]  # a fresh clock, not an unwrap step of the old one
    cut = [r for r in sink.records if isinstance(r, Malformed)]
    assert len(cut) == 1 and cut[0].raw == b"4000900 lever_d"


def test_garbage_bytes_are_kept_as_malformed_lines_and_reading_goes_on(boards):
    dev = boards()
    sink, source = opened(dev)
    try:
        dev.write(encode_header() + lines(2) + b"\x00\x01\xfe\xff\n" + b"x" * 400 + b"\n" + lines(2, start=9000))
        wait_for(lambda: len(sink.events) == 4, what="events around garbage")
    finally:
        source.stop()
    bad = [r for r in sink.records if isinstance(r, Malformed)]
    assert [r.reason.split(" (")[0] for r in bad] == ["not ASCII", "line longer than 256 bytes"]
    assert source.status().malformed == 2 and source.status().events == 4


def test_a_silent_rig_is_reported_silent_with_its_duration(boards):
    dev = boards()
    sink, source = opened(dev, silent_after_s=0.3)
    try:
        dev.write(encode_header() + lines(1))
        wait_for(lambda: len(sink.events) == 1, what="one event")
        wait_for(lambda: source.status().state == SILENT, what="silence noticed")
        status = source.status()
        assert status.silent_s >= 0.3 and status.text.startswith("silent for ")
        dev.write(lines(1, start=99))
        wait_for(lambda: source.status().state == "reading", what="reading again")
    finally:
        source.stop()


def test_an_exception_in_the_callback_surfaces_as_connection_lost(boards):
    dev = boards()
    lost: list[BaseException] = []

    def broken(batch: Batch) -> None:
        raise ValueError("display queue broke")

    source = running(SerialSource(dev.name, broken, wait_for_header=False, on_lost=lost.append))
    wait_for(lambda: source.status().state == CONNECTED, what="open")
    dev.write(lines(1))
    wait_for(lambda: not source.alive, what="reader to end")
    status = source.status()
    assert status.state == LOST
    assert status.text == "connection lost: ValueError: display queue broke"
    assert isinstance(lost[0], ValueError) and source.failure is lost[0]
    assert status.gap_since is not None  # nothing is being read any more


def test_device_absent_at_start_is_waited_for_and_the_wait_is_a_gap(boards, tmp_path):
    link = tmp_path / "rig1"
    sink = Collect()
    source = running(SerialSource(str(link), sink, retry_s=0.05))
    try:
        wait_for(lambda: source.status().state == WAITING, what="waiting")
        dev = boards()
        os.symlink(dev.name, link)
        wait_for(lambda: source.status().state == CONNECTED, timeout=2.0, what="found")
    finally:
        source.stop()
    assert len(sink.gaps) == 1 and "not present" in sink.gaps[0].reason


def test_found_again_by_usb_serial_number(boards, monkeypatch, tmp_path):
    dev = boards()
    info = ListPortInfo(dev.name)  # pyserial's own port record
    info.serial_number, info.vid, info.pid, info.description = "A1B2C3", 0x2341, 0x0043, "Box controller"
    monkeypatch.setattr(source_mod.list_ports, "comports", lambda: [info])
    assert find_by_serial_number("A1B2C3") == dev.name and find_by_serial_number("nope") is None
    listed = list_serial_ports()
    assert listed[0].vid_pid == "2341:0043" and listed[0].serial_number == "A1B2C3"
    sink = Collect()
    source = running(SerialSource(str(tmp_path / "gone"), sink, usb_serial="A1B2C3", wait_for_header=False))
    try:
        wait_for(lambda: source.status().state == CONNECTED, what="open by serial number")
        assert source.opened_path == dev.name
        dev.write(lines(2))
        wait_for(lambda: len(sink.events) == 2, what="events")
    finally:
        source.stop()


def test_the_port_is_opened_exclusively(boards):
    dev = boards()
    held = open_port(dev.name)
    try:
        with pytest.raises(serial.SerialException):
            open_port(dev.name)
    finally:
        held.close()


def test_no_header_after_open_keeps_every_line_and_says_so(boards):
    dev = boards()
    sink, source = opened(dev, header_wait_s=0.2)
    try:
        dev.write(b"ut line\n" + lines(3))  # a board that did not reset: first line was cut by the open
        wait_for(lambda: len(sink.events) == 3, what="lines read")
        wait_for(lambda: source.status().last_notice, what="the notice")
    finally:
        source.stop()
    assert sink.records[0].raw == b"ut line"  # the cut line is kept as malformed, the first whole line read
    assert "no header" in source.status().last_notice and "reset = false" in source.status().last_notice


def test_socket_url_disconnect_is_an_unplug_and_the_source_reconnects():
    import socket

    server = socket.create_server(("127.0.0.1", 0))
    url = f"socket://127.0.0.1:{server.getsockname()[1]}"  # pyserial's socket handler
    sink = Collect()
    source = running(SerialSource(url, sink, wait_for_header=False, retry_s=0.05))
    try:
        first, _ = server.accept()
        wait_for(lambda: source.status().state == CONNECTED, what="open done (pyserial empties the socket on open)")
        first.sendall(lines(3))
        wait_for(lambda: len(sink.events) == 3, what="events over the socket")
        first.close()
        wait_for(lambda: source.status().gaps == 1, what="disconnect seen and connection made again")
        second, _ = server.accept()
        second.sendall(lines(2, start=50))
        wait_for(lambda: len(sink.events) == 5, what="events after reconnecting")
        second.close()
    finally:
        source.stop()
        server.close()
    assert "socket disconnected" in sink.gaps[0].reason  # pyserial's own message (STACK-NOTES.md)
    assert {e.segment for e in sink.events[3:]} == {sink.events[0].segment + 1}
