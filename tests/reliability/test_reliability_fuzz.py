"""Fuzzing: mutated wire-format lines through the decoder into the store.

Nothing may raise, the writer must stay healthy, and every line of the stream
(counted independently from the format's rules, `stream_lines`) must come out of the
store exactly once, by its line number: as an event row whose counter is the
line's first field, or as a raw row (malformed, header, comment) holding the
line's bytes. Short: 10^4 lines; long (--long): 10^6.
"""

from __future__ import annotations

import random
import re
import sqlite3
import time
from pathlib import Path

import pytest

from drivers.status import Batch
from drivers.wire import MAX_LINE, WireDecoder, encode_event, encode_header
from monitor.store import db
from monitor.store.writer import FAILED, StoreWriter

GOOD = [("lever_down",), ("lever_up", 2), ("lick",), ("trial_start",), ("outcome", "hit"), ("reward", 30),
        ("valve", 12.5), ("cue", "tone", 200), ("param", "window_low_ms", 520), ("joystick", 12.5, -3.0),
        ("note", "box door opened"), ("session_start",), ("mystery_word", "x")]
# Header variants a fuzzed stream may switch to, including counters that never wrap (wrap=0) or are
# wider than SQLite's 64-bit integers (wrap=64): their huge times must be malformed lines, not a crash.
HEADERS = [encode_header(), encode_header(clock="ms", wrap=16), encode_header(wrap=8, fw="fz"),
           encode_header(wrap=0), encode_header(wrap=64), encode_header(clock="ms", wrap=0),
           b"# rigside-wire 2 clock=us\n", b"# rigside-wire 1 clock=ns\n", b"# rigside-wire 1 wrap=x\n",
           b"# just a comment\n", b"#\n"]
NOISE = [b"\x00", b"\xff", b"\xc3\xa9", b"\r", b"\t", b" ", b"#", b"-", b"1e9", b"99999999999", b"\x1b[2J", b"\n",
         b"note", b"=cmd|' /C calc'!A0"]


def mutate(line: bytes, rng: random.Random) -> bytes:
    """One to three random edits: flip, insert noise, delete, duplicate, cut, stretch past the line cap."""
    data = bytearray(line)
    for _ in range(rng.randint(1, 3)):
        op = rng.randrange(7)
        at = rng.randrange(len(data) + 1)
        if op == 0 and data:
            data[min(at, len(data) - 1)] = rng.randrange(256)
        elif op == 1:
            data[at:at] = rng.choice(NOISE)
        elif op == 2:
            del data[at:at + rng.randint(1, 4)]
        elif op == 3:
            data[at:at] = data[:rng.randint(0, len(data))]
        elif op == 4:
            del data[at:]
        elif op == 5:
            data[at:at] = bytes(rng.randrange(32, 127) for _ in range(rng.choice((MAX_LINE - 10, MAX_LINE + 1, 600))))
        else:
            data[at:at] = str(rng.randrange(10**12)).encode()
    return bytes(data)


def fuzzed_stream(lines: int, seed: int) -> bytes:
    rng = random.Random(seed)
    parts, t = [encode_header(fw="fuzz")], 1000
    for _ in range(lines - 1):
        roll = rng.random()
        if roll < 0.02:
            parts.append(rng.choice(HEADERS))
            continue
        t = (t + rng.randint(1, 50_000)) % 2**32
        line = encode_event(t % 256, *rng.choice(GOOD))  # below every wrap in HEADERS
        parts.append(mutate(line, rng) if roll < 0.5 else line)
    return b"".join(parts)


def stream_lines(data: bytes) -> list[bytes]:
    """The lines of a stream as docs/wire-format.md defines them, counted apart from the decoder:
    b"\\r\\n", a lone b"\\r" and b"\\n" end a line, and a header tag after the start of a line that is
    not a note begins a line of its own (a header glued to a line a reset cut short)."""
    out = []
    for line in re.split(rb"\r\n|\r|\n", data):
        at = line.find(b"# rigside-wire", 1)
        while at > 0:
            words = line[:at].split(None, 2)
            if len(words) >= 2 and words[0].isdigit() and words[1] == b"note":
                break
            out.append(line[:at])
            line = line[at:]
            at = line.find(b"# rigside-wire", 1)
        out.append(line)
    return out


def store_and_count(tmp_path: Path, data: bytes, seed: int) -> tuple[StoreWriter, int]:
    writer = StoreWriter(tmp_path / "fuzz.sqlite3")
    writer.start()
    source = writer.call(lambda c: db.register_source(c, "file", "/fuzz/box.rsw", "box"))
    session = writer.call(lambda c: db.start_session(c, source, "fuzz", "box", "p", 1, None))
    rng = random.Random(seed + 1)
    decoder, at, records = WireDecoder(), 0, 0
    while at < len(data):
        step = rng.choice((1, 7, 64, 333, 4096, 65536))
        batch = decoder.feed(data[at:at + step])
        at += step
        records += len(batch)
        if batch:
            writer.submit(Batch(batch, time.time()), source_id=source, session_id=session, live=False)
    tail = decoder.close()
    records += len(tail)
    writer.submit(Batch(tail, time.time()), source_id=source, session_id=session, live=False)
    return writer, records


def stored_lines(path: Path) -> tuple[dict[int, int], dict[int, bytes]]:
    conn = sqlite3.connect(path)
    try:
        events = dict(conn.execute("SELECT line, raw_time FROM events"))
        raw = dict(conn.execute("SELECT line, raw FROM raw_lines WHERE kind IN ('malformed', 'header', 'comment')"))
        event_count = conn.execute("SELECT count(*) FROM events").fetchone()[0]
        raw_count = conn.execute("SELECT count(*) FROM raw_lines WHERE kind != 'notice'").fetchone()[0]
    finally:
        conn.close()
    assert len(events) == event_count and len(raw) == raw_count, "a line number was stored twice"
    return events, raw


@pytest.mark.slow
@pytest.mark.parametrize("lines", [pytest.param(10_000, id="short"),
                                   pytest.param(1_000_000, id="long", marks=pytest.mark.long)])
def test_fuzzed_lines_are_each_stored_once_as_event_or_raw_row(tmp_path, lines):
    data = fuzzed_stream(lines, seed=lines)
    expected = stream_lines(data)
    if expected[-1] == b"":
        expected.pop()
    writer, records = store_and_count(tmp_path, data, seed=lines)
    assert writer.stop(timeout=120), writer.status().text
    assert writer.status().state != FAILED, writer.status().text
    events, raw = stored_lines(writer.path)
    stored = set(events) | set(raw)
    missing = [n for n in range(1, len(expected) + 1) if n not in stored]
    both = set(events) & set(raw)
    for number, counter in events.items():  # an event row's counter is its line's first field
        assert int(expected[number - 1].split(None, 1)[0]) == counter, (number, expected[number - 1])
    for number, text in raw.items():  # a raw row keeps the line's own bytes (up to the cap, without \r)
        line = expected[number - 1].removesuffix(b"\r")
        assert text == line[:MAX_LINE] or line.startswith(b"# rigside-wire"), (number, line[:80], text[:80])
    conn = sqlite3.connect(writer.path)
    malformed = conn.execute("SELECT count(*) FROM raw_lines WHERE kind = 'malformed'").fetchone()[0]
    conn.close()
    print(f"\nfuzz: {lines:,} lines generated, {len(expected):,} in the stream after mutation (an edit can cut "
          f"or add a newline), {records:,} records, {len(events):,} events, {len(raw):,} raw rows "
          f"({malformed:,} malformed), "
          f"lost: {len(missing)}, duplicated: {len(both)}, writer {writer.status().state}")
    assert records == len(expected)
    assert not missing and not both
    assert len(events) + len(raw) == len(expected)


def test_a_counter_too_big_for_sqlite_is_kept_and_the_writer_goes_on(tmp_path):
    data = encode_header(wrap=0) + b"9" * 40 + b" lick\n" + encode_header(wrap=64) + b"18446744073709551615 lick\n" \
        + encode_event(5, "lick")
    writer, records = store_and_count(tmp_path, data, seed=3)
    assert writer.stop(timeout=10)
    events, raw = stored_lines(writer.path)
    assert writer.status().state != FAILED
    assert len(events) + len(raw) == records == 5
