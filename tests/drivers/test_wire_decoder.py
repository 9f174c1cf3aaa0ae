"""Wire format v1 decoder and encoder (docs/wire-format.md).

Every decoder input is fed three ways (whole, byte by byte, and with a
trailing partial line held back), the habit of h11's test-suite.
"""

from __future__ import annotations

import pytest
from hypothesis import example, given, settings
from hypothesis import strategies as st

from drivers.wire import (
    MAX_LINE,
    Comment,
    Event,
    Header,
    LineDecoder,
    Malformed,
    WireDecoder,
    decode_all,
    encode_event,
    encode_header,
)
from fixtures.sessions import CONTRACT_EXAMPLE



def feed_whole(data: bytes) -> list:
    return decode_all(data)


def feed_bytewise(data: bytes) -> list:
    decoder = WireDecoder()
    out = []
    for i in range(len(data)):
        out += decoder.feed(data[i : i + 1])
    return out + decoder.close()


def feed_with_partial_tail(data: bytes) -> list:
    """All but the last 5 bytes, check nothing of the tail leaked, then the rest."""
    decoder = WireDecoder()
    head, tail = data[:-5], data[-5:]
    out = decoder.feed(head)
    assert decoder.pending == len(head) - sum(r.size for r in out)
    out += decoder.feed(tail)
    return out + decoder.close()


THREE_WAYS = [feed_whole, feed_bytewise, feed_with_partial_tail]


@pytest.mark.parametrize("feed", THREE_WAYS)
def test_contract_example_decodes_to_the_documented_events(feed):
    records = feed(CONTRACT_EXAMPLE)
    header, *events = records
    assert isinstance(header, Header)
    assert header.fields["fw"] == "box-v3" and header.fields["start"] == "2026-03-02T09:14:03+01:00"
    assert all(isinstance(e, Event) for e in events)
    assert [e.name for e in events] == [
        "trial_start", "lever_down", "lever_up", "lever_down", "lever_up",
        "outcome", "reward", "lick", "param",
    ]
    assert events[5].args == ("hit",) and events[6].args == ("30",)
    assert events[8].args == ("window_low_ms", "520") and events[8].value == "window_low_ms 520"
    # The interval is computed from device time: 1712004 - 1048900 us.
    assert events[3].t_us - events[1].t_us == 663_104


@pytest.mark.parametrize("feed", THREE_WAYS)
def test_crlf_tabs_and_note_text_kept_verbatim(feed):
    data = b"10\tlever_down\t2\r\n20 note  box  door   open  \r\n30 lick\n"
    down, note, lick = feed(data)
    assert down.name == "lever_down" and down.args == ("2",)
    assert note.name == "note" and note.args == ("box  door   open",)
    assert lick.t_us == 30


@pytest.mark.parametrize("feed", THREE_WAYS)
def test_malformed_lines_are_values_with_text_and_position(feed):
    data = (
        b"100 lever_down\n"
        b"garbage here\n"
        b"-5 lick\n"
        b"200 reward lots\n"
        b"300 outcome\n"
        b"4294967296 lick\n"  # not below 2^32
        b"\xff\xfe binary\n"
        b"# rigside-wire 7 clock=us\n"
        b"400 lever_up\n"
    )
    records = feed(data)
    kinds = [type(r).__name__ for r in records]
    assert kinds == ["Event"] + ["Malformed"] * 7 + ["Event"]
    bad = records[1]
    assert bad.raw == b"garbage here" and bad.line == 2 and bad.offset == len(b"100 lever_down\n")
    assert "unsupported wire version" in records[7].reason
    assert records[8].line == 9


@pytest.mark.parametrize("feed", THREE_WAYS)
def test_unknown_events_are_kept(feed):
    records = feed(b"5 door_open left\n6 lever_down\n")
    assert records[0] == Event(5, "door_open", ("left",), 5, 0, 1, 0, 17)


@pytest.mark.parametrize("feed", THREE_WAYS)
def test_overlong_line_is_capped_counted_and_followed_by_good_lines(feed):
    long_line = b"1 note " + b"x" * 1000 + b"\n"
    records = feed(long_line + b"2 lick\n")
    bad, lick = records
    assert isinstance(bad, Malformed) and bad.size == len(long_line)
    assert len(bad.raw) == MAX_LINE and "longer than 256" in bad.reason
    assert lick.name == "lick" and lick.offset == len(long_line)


def test_overlong_line_buffer_stays_capped():
    decoder = WireDecoder()
    for _ in range(1000):
        decoder.feed(b"y" * 1000)
    assert len(decoder._buf) <= MAX_LINE  # the decoder caps what it holds (h11's rule)
    assert decoder.pending == 1_000_000


def test_trailing_partial_line_waits_then_becomes_malformed_at_close():
    decoder = WireDecoder()
    assert decoder.feed(b"1 lick\n2 lev") == [Event(1, "lick", (), 1, 0, 1, 0, 7)]
    assert decoder.pending == 5
    (rest,) = decoder.close()
    assert isinstance(rest, Malformed) and rest.raw == b"2 lev" and "unterminated" in rest.reason


def test_header_starts_new_segment_and_resets_unwrap():
    data = (
        encode_header(fw="a") + encode_event(4_000_000_000, "lick")
        + encode_event(5, "lick")  # wraps: 2^32 + 5
        + encode_header(clock="ms", wrap=16) + encode_event(7, "lick")
    )
    h1, a, b, h2, c = decode_all(data)
    assert (h1.segment, a.segment, h2.segment, c.segment) == (1, 1, 2, 2)
    assert b.t_us == 2**32 + 5  # 2^32 us per wrap: microcontroller datasheet fact (REFERENCES.md)
    assert c.t_us == 7000 and h2.wrap == 16


EVENT_EXAMPLES = [
    ("lever_down",), ("lever_down", 2), ("lever_up",), ("lever_up", 3), ("trial_start",),
    ("outcome", "hit"), ("outcome", "premature"), ("reward",), ("reward", 30), ("valve", 25),
    ("lick",), ("cue", "tone"), ("cue", "light", 500), ("param", "target_ms", 650),
    ("param", "stage", "final"), ("joystick", 12.5), ("joystick", -3.25, 4),
    ("session_start",), ("session_end",), ("note", "weighed 21.3 g, door checked"),
]


@pytest.mark.parametrize("example", EVENT_EXAMPLES, ids=lambda e: "-".join(map(str, e)))
def test_encode_decode_round_trip_every_event_type(example):
    name, *args = example
    (event,) = decode_all(encode_event(123456, name, *args))
    assert isinstance(event, Event) and event.name == name
    assert event.args == tuple(str(a) for a in args) and event.raw_time == 123456


def test_round_trip_covers_every_known_event():
    from drivers.wire import KNOWN_EVENTS

    assert {e[0] for e in EVENT_EXAMPLES} == KNOWN_EVENTS


@pytest.mark.parametrize(
    "bad", [("reward", "lots"), ("outcome",), ("param", "x"), ("lever down",), ("note",), ("valve",)]
)
def test_encoder_refuses_what_the_decoder_would_reject(bad):
    with pytest.raises(ValueError):
        encode_event(1, *bad)


def test_header_round_trip():
    (header,) = decode_all(encode_header(clock="ms", wrap=0, fw="box-v3", start="2026-03-02T09:14:03+01:00", rig="B4"))
    assert (header.clock, header.wrap, header.fields["rig"]) == ("ms", 0, "B4")


def test_plain_comment_is_kept():
    (comment,) = decode_all(b"# calibrated valve on Tuesday\n")
    assert comment == Comment("# calibrated valve on Tuesday", 1, 0, 30)


def _accounting(data: bytes, chunks: list[int]) -> None:
    decoder = WireDecoder()
    records, position = [], 0
    for size in chunks:
        records += decoder.feed(data[position : position + size])
        position += size
    records += decoder.feed(data[position:])
    held = decoder.pending
    closing = decoder.close()
    records += closing
    # Records tile the stream: each starts where the previous ended, none lost.
    offset = 0
    for number, record in enumerate(records, start=1):
        assert record.offset == offset and record.line == number
        offset += record.size
    assert offset == len(data)
    assert held == sum(r.size for r in closing)  # what waited for its line end is what close() gave


@settings(max_examples=300, deadline=None)
@given(st.binary(max_size=2000), st.lists(st.integers(min_value=0, max_value=300), max_size=20))
def test_random_bytes_never_raise_and_every_byte_is_accounted_for(data, chunks):
    _accounting(data, chunks)


LINE_PIECES = st.sampled_from(
    [b"1 lick", b"2 lever_down 1", b"# rigside-wire 1 wrap=8", b"\r", b" ", b"\t", b"x", b"\xff", b"99999999999 lick",
     b"3 note hi", b"# c", b"5 param stage 2"]
)


@pytest.mark.slow
@settings(max_examples=300, deadline=None)
@given(st.lists(st.lists(LINE_PIECES, max_size=4).map(b"".join), max_size=40), st.lists(st.integers(0, 40), max_size=10))
def test_line_shaped_input_never_raises_and_is_accounted_for(lines, chunks):
    _accounting(b"\n".join(lines), chunks)


@settings(max_examples=200, deadline=None)
@given(st.binary(max_size=600))
def test_chunking_never_changes_the_records(data):
    assert feed_whole(data) == feed_bytewise(data)


def test_state_restore_resumes_after_the_last_complete_line():
    import json

    data = encode_header(wrap=16, clock="ms") + b"".join(encode_event(t % 2**16, "lick") for t in range(0, 300_000, 7_001))
    whole = decode_all(data)
    cut = data.index(b"\n", len(data) // 2) + 1
    first = WireDecoder()
    head = first.feed(data[:cut])
    saved = json.loads(json.dumps(first.state()))  # stored as JSON in the store
    second = WireDecoder()
    second.restore(saved)
    assert head + second.feed(data[saved["offset"]:]) + second.close() == whole


def test_restore_refuses_another_decoders_state():
    from drivers.mapping import MappedDecoder, parse_mapping

    mapped = MappedDecoder(parse_mapping('[format]\ndelimiter=";"\n[columns]\ndevice_time=0\nevent=1\n[clock]\nunit="ms"\n[events]\n'))
    with pytest.raises(ValueError, match="mapped"):
        WireDecoder().restore(mapped.state())


def test_times_beyond_64_bit_storage_are_malformed():
    data = encode_header(wrap=0) + b"9" * 40 + b" lick\n" + encode_header(wrap=64) + b"18446744073709551615 lick\n"
    _, huge, _, wide = decode_all(data)
    assert isinstance(huge, Malformed) and "2^62" in huge.reason
    assert isinstance(wide, Malformed) and "2^62" in wide.reason


def _decode_reconnected(data: bytes, cut: int, line_by_line: bool) -> list:
    """The records of `data` with a reconnect after its first `cut` bytes; `line_by_line`: every line takes
    the full checks (the route of a chunk that is not plain ASCII)."""
    decoder = WireDecoder()
    if line_by_line:
        decoder._decode_lines = lambda chunk, lines, out: LineDecoder._decode_lines(decoder, chunk, lines, out)
    records = decoder.feed(data[:cut])
    decoder.new_segment()
    return records + decoder.feed(data[cut:]) + decoder.close()


# ASCII without a lone CR, with wrapping 8-bit clocks, resets, glued headers and bad lines: the inline route
PLAIN_PIECES = st.sampled_from(
    [b"1 lick", b"2 lever_down 1", b"300 lever_up 1", b"# rigside-wire 1 wrap=8", b"# rigside-wire 1 clock=ms wrap=0",
     b"# rigside-wire 1 wrap=0", b" ", b"\t", b"x", b"99999999999 lick", b"3 note hi # rigside-wire 1", b"# c",
     b"5 param stage 2", b"7 valve", b"8 reward 5000", b"9 9lives", b"4611686018427388 lick", b"1 outcome hit",
     b"4611686018427387904 lick", b"2 zeta_word a b"]
)


@settings(max_examples=400, deadline=None)
@given(st.lists(st.lists(PLAIN_PIECES, max_size=4).map(b"".join), max_size=60), st.integers(0, 400))
@example([b"# rigside-wire 1 wrap=0", b"1 lick", b"4611686018427387904 lick", b"# rigside-wire 1 clock=ms wrap=0",
          b"4611686018427388 lick", b"1 lick"], 400)
def test_plain_event_lines_decoded_inline_give_what_the_full_checks_give(lines, cut):
    data = b"\n".join(lines) + b"\n"
    assert _decode_reconnected(data, cut, False) == _decode_reconnected(data, cut, True)


def test_a_long_plain_session_decodes_as_its_lines_say():
    text = "".join(f"{1000 * i} lever_down 1\n{1000 * i + 50} reward 30\n" for i in range(5000))
    events = decode_all(b"# rigside-wire 1 clock=us wrap=32\n" + text.encode())
    # an independent reading: Python's own split of the lines written above
    plain = [(int(t), word, tuple(rest)) for t, word, *rest in (line.split() for line in text.splitlines())]
    assert [(e.raw_time, e.name, e.args) for e in events[1:]] == plain
    assert [e.line for e in events[1:]] == list(range(2, 10002))
    assert events[-1].offset + events[-1].size == len(text) + len(b"# rigside-wire 1 clock=us wrap=32\n")
