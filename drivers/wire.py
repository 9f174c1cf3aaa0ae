"""Wire format version 1: a sans-I/O line decoder and the matching encoder.

Rule: bytes in, records out. `WireDecoder.feed(data)` takes any slice of the
byte stream a rig sends and returns one record per complete line, in order:
`Event`, `Header`, `Comment` or `Malformed`. The decoder holds no port or file,
never raises on input, and buffers at most `MAX_LINE` bytes of an unfinished
line (the rest of an over-long line is counted, not kept). Every byte fed is
accounted for: records tile the stream (`offset`, `size` include the line
terminator), and `pending` is what still waits for its newline.
Device counters are unwrapped here, per clock segment (a header line starts a
new segment), with `drivers.clock.Unwrapper`. The encoder writes exactly what
the decoder reads; the simulator and firmware tests use it.
"""

from __future__ import annotations

import re
from typing import Any, NamedTuple, Union

from drivers.clock import Unwrapper

WIRE_VERSION = 1
MAX_LINE = 256  # bytes of line content, terminator excluded (contract: at most 256)
# Device times must fit a signed 64-bit integer (the store's integers) with room
# for unwrapping: 2^62 us is about 146,000 years, beyond any real counter.
MAX_TIME_US = 1 << 62
HEADER_TAG = b"# rigside-wire"

CLOCK_UNITS_US = {"us": 1, "ms": 1000}
DEFAULT_CLOCK = "us"
DEFAULT_WRAP = 32


class Event(NamedTuple):
    """One event line. `t_us` is the unwrapped device time in microseconds."""

    t_us: int
    name: str
    args: tuple[str, ...]
    raw_time: int
    segment: int
    line: int
    offset: int
    size: int
    wall_time: str | None = None  # ISO 8601 with offset, from mapped formats
    animal: str | None = None  # from mapped formats holding several animals
    session: str | None = None  # from mapped formats holding several sessions

    @property
    def value(self) -> str:
        """The event's arguments as one text field (CSV, store)."""
        return " ".join(self.args)


class Header(NamedTuple):
    """A `# rigside-wire 1 key=value ...` line: starts a new clock segment."""

    version: int
    clock: str
    wrap: int
    fields: dict[str, str]
    segment: int
    line: int
    offset: int
    size: int


class Comment(NamedTuple):
    """A `#` line that is not a header; its text is kept."""

    text: str
    line: int
    offset: int
    size: int


class Malformed(NamedTuple):
    """A line that is not valid wire format: kept verbatim, with its position."""

    raw: bytes
    reason: str
    line: int
    offset: int
    size: int


Record = Union[Event, Header, Comment, Malformed]

# Known events of version 1: (min args, max args, numeric arg positions).
# `note` is special: the rest of the line is one verbatim argument.
_NUM = re.compile(rb"^[+-]?(\d+(\.\d*)?|\.\d+)([eE][+-]?\d+)?$")
_WORD = re.compile(rb"^[A-Za-z_][A-Za-z0-9_.\-]*$")
EVENT_SPECS: dict[str, tuple[int, int, tuple[int, ...]]] = {
    "lever_down": (0, 1, (0,)),
    "lever_up": (0, 1, (0,)),
    "trial_start": (0, 0, ()),
    "outcome": (1, 1, ()),
    "reward": (0, 1, (0,)),
    "valve": (1, 1, (0,)),
    "lick": (0, 1, (0,)),
    "cue": (1, 2, (1,)),
    "param": (2, 2, ()),
    "joystick": (1, 2, (0, 1)),
    "session_start": (0, 0, ()),
    "session_end": (0, 0, ()),
    "note": (1, 1, ()),
}
KNOWN_EVENTS = frozenset(EVENT_SPECS)
# What a numeric argument can be on a real rig, (event, argument index) -> (low, high, unit); past
# these a line is malformed (kept and counted), never a figure: a one-drop reward of 3e6 uL would
# hide a water deficit. Rodent rewards are tens of uL, a valve opens for tens of ms (common practice).
ARG_LIMITS: dict[tuple[str, int], tuple[float, float, str]] = {
    ("lever_down", 0): (0, 255, "lever number"),
    ("lever_up", 0): (0, 255, "lever number"),
    ("lick", 0): (0, 255, "port number"),
    ("reward", 0): (0, 1000, "uL"),
    ("valve", 0): (0, 10_000, "ms"),
    ("cue", 1): (0, 86_400_000, "ms"),
    ("joystick", 0): (-360, 360, "degrees"),
    ("joystick", 1): (-360, 360, "degrees"),
}
OUTCOME_WORDS = ("hit", "miss", "premature", "lone", "omission")


_NEED_ARGS = frozenset(name for name, (low, _, _) in EVENT_SPECS.items() if low > 0)
_LINE_END = re.compile(rb"\r\n|\r|\n")
_NAME_CACHE: dict[bytes, str | None] = {}
_NAME_CACHE_MAX = 4096  # garbage can invent endless words: stop caching past this


def _event_name(word: bytes) -> str | None:
    """The event word as text, or None when it is not a word (cached: hot path)."""
    try:
        return _NAME_CACHE[word]
    except KeyError:
        name = word.decode("ascii") if _WORD.match(word) else None
        if len(_NAME_CACHE) < _NAME_CACHE_MAX:
            _NAME_CACHE[word] = name
        return name


_ARGS_CACHE: dict[tuple[str, bytes], tuple[str | None, tuple[str, ...]]] = {}
_ARGS_CACHE_MAX = 65536  # argument texts repeat (lever 1, reward 30); noise must not grow it


def _parse_args(name: str, text: bytes) -> tuple[str | None, tuple[str, ...]]:
    """(why the arguments do not fit, or None; the arguments as text). Cached: hot path."""
    key = (name, text)
    found = _ARGS_CACHE.get(key)
    if found is None:
        args_b = [text.strip()] if name == "note" else text.split()
        found = (check_args(name, args_b), tuple(a.decode("ascii") for a in args_b))
        if len(_ARGS_CACHE) < _ARGS_CACHE_MAX and name != "note":  # notes rarely repeat
            _ARGS_CACHE[key] = found
    return found


def check_args(name: str, args: list[bytes]) -> str | None:
    """Return why `args` do not fit event `name`, or None when they do."""
    spec = EVENT_SPECS.get(name)
    if spec is None:
        return None  # unknown events are kept whatever their arguments
    low, high, numeric = spec
    if not low <= len(args) <= high:
        want = str(low) if low == high else f"{low}-{high}"
        return f"{name} takes {want} argument(s), got {len(args)}"
    for i in numeric:
        if i < len(args):
            if not _NUM.match(args[i]):
                return f"{name} argument {i + 1} must be a number, got {args[i].decode('ascii', 'replace')!r}"
            low_v, high_v, unit = ARG_LIMITS.get((name, i), (-1e15, 1e15, ""))
            if not low_v <= float(args[i]) <= high_v:
                return (f"{name} argument {i + 1} is {args[i].decode('ascii')}: outside {low_v:g}-{high_v:g}"
                        f"{' ' + unit if unit else ''}, not a real value")
    return None


def parse_header(text: str) -> tuple[int, str, int, dict[str, str]] | str:
    """Parse a header line's text; return (version, clock, wrap, fields) or the error."""
    parts = text[1:].split()
    if len(parts) < 2 or parts[0] != "rigside-wire":
        return "not a rigside-wire header"
    if parts[1] != str(WIRE_VERSION):
        return f"unsupported wire version {parts[1]!r} (this program reads {WIRE_VERSION})"
    fields: dict[str, str] = {}
    for item in parts[2:]:
        key, sep, value = item.partition("=")
        if not sep or not key:
            return f"header field {item!r} is not key=value"
        fields[key] = value
    clock = fields.get("clock", DEFAULT_CLOCK)
    if clock not in CLOCK_UNITS_US:
        return f"header clock={clock!r}: expected us or ms"
    wrap_text = fields.get("wrap", str(DEFAULT_WRAP))
    if not wrap_text.isdigit() or not 0 <= int(wrap_text) <= 64:
        return f"header wrap={wrap_text!r}: expected counter bits 0-64"
    return WIRE_VERSION, clock, int(wrap_text), fields


class LineDecoder:
    """Line splitting shared by every decoder: buffering, the cap, positions.

    Subclasses implement `_decode_line(raw, size)`, which must advance `line`
    and `offset` (through `_malformed` or `_position`) exactly once per line.
    """

    max_line = MAX_LINE

    def __init__(self, line: int = 0, offset: int = 0) -> None:
        self._buf = b""
        self._overflow = 0  # bytes of an over-long line seen beyond the kept part
        self._cr_last = False  # that line's last byte so far is a '\r'
        self.line = line  # lines completed so far
        self.offset = offset  # byte offset of the first byte not yet in a record

    @property
    def pending(self) -> int:
        """Bytes received that wait for their line's newline."""
        return len(self._buf) + self._overflow

    def feed(self, data: bytes) -> list[Record]:
        """Decode every line that `data` completes; keep the unfinished rest."""
        out: list[Record] = []
        if not data:
            return out
        if self._overflow:
            data = self._feed_overflow(data, out)
            if data is None:
                return out
        data = self._buf + data if self._buf else data
        if b"\r" in data and (data.count(b"\r") != data.count(b"\r\n") or data[-1:] == b"\r"):
            rest = self._feed_with_lone_cr(data, out)
        else:
            lines = data.split(b"\n")
            rest = lines.pop()
            if lines:
                self._decode_lines(data, lines, out)
        cap = self.max_line
        if len(rest) > cap + 1:  # +1 leaves room for a '\r' before '\n'
            self._buf = rest[:cap]
            self._overflow = len(rest) - cap
            self._cr_last = rest[-1:] == b"\r"
        else:
            self._buf = rest
        return out

    def _feed_overflow(self, data: bytes, out: list[Record]) -> bytes | None:
        """Skip the rest of an over-long line up to its end; the bytes after it, or None when none."""
        if self._cr_last:  # the line's last byte so far was '\r': a '\n' may complete it
            self._cr_last = False
            if data[:1] == b"\n":
                self._overflow += 1
                data = data[1:]
            self._emit_overlong(out)
            return data
        end = _LINE_END.search(data)
        if end is None or (end.group() == b"\r" and end.end() == len(data)):
            self._overflow += len(data)
            self._cr_last = end is not None
            return None
        self._overflow += end.end()
        self._emit_overlong(out)
        return data[end.end():]

    def _feed_with_lone_cr(self, data: bytes, out: list[Record]) -> bytes:
        """Split at `\\n`, `\\r\\n` and a lone `\\r`; a final `\\r` waits for the next byte."""
        start = 0
        for end in _LINE_END.finditer(data):
            cut = end.end()
            if cut == len(data) and data[-1:] == b"\r":
                break  # `\r` last: a `\n` may follow in the next read
            raw = data[start:cut]
            # a lone CR stays on the line as in the CRLF case; the size counts it once
            record = self._decode_line(raw[:-1] if raw[-1:] == b"\n" else raw, len(raw))
            out.extend(record) if type(record) is list else out.append(record)
            start = cut
        return data[start:]

    def close(self) -> list[Record]:
        """End of stream: an unterminated last line becomes a malformed record."""
        out: list[Record] = []
        if self._overflow:
            self._emit_overlong(out, terminated=self._cr_last)
            self._cr_last = False
        elif self._buf[-1:] == b"\r":  # ended by a lone CR that nothing followed
            raw, self._buf = self._buf, b""
            record = self._decode_line(raw, len(raw))
            out.extend(record) if type(record) is list else out.append(record)
        elif self._buf:
            raw = self._buf
            self._buf = b""
            out.append(self._malformed(raw, "unterminated last line", len(raw)))
        return out

    def _emit_overlong(self, out: list[Record], terminated: bool = True) -> None:
        kept = self._buf
        size = len(kept) + self._overflow
        self._buf = b""
        self._overflow = 0
        reason = self._overlong(size) + ("" if terminated else ", unterminated")
        out.append(self._malformed(kept, reason, size))

    def _overlong(self, size: int) -> str:
        return f"line longer than {self.max_line} bytes ({size} bytes, the first {self.max_line} kept)"

    kind = "lines"

    def state(self) -> dict[str, Any]:
        """JSON-able state to go on after the last complete line (see `restore`)."""
        return {"kind": self.kind, "line": self.line, "offset": self.offset}

    def restore(self, state: dict[str, Any]) -> None:
        """Continue from a `state()` taken from a decoder of the same kind.

        Only complete lines are covered: the caller resumes its input at `offset`.
        ValueError when the state belongs to another kind of decoder.
        """
        if state.get("kind") != self.kind:
            raise ValueError(f"saved reading state is for a {state.get('kind')} decoder, not {self.kind}")
        self._buf, self._overflow, self._cr_last = b"", 0, False
        self.line, self.offset = int(state["line"]), int(state["offset"])

    def _position(self, size: int) -> tuple[int, int]:
        """Count one line of `size` bytes; return its (line number, offset)."""
        self.line += 1
        here = self.line, self.offset
        self.offset += size
        return here

    def _malformed(self, raw: bytes, reason: str, size: int) -> Malformed:
        line, offset = self._position(size)
        return Malformed(raw, reason, line, offset, size)

    def _decode_lines(self, data: bytes, lines: list[bytes], out: list[Record]) -> None:
        """The records of complete `\\n`-ended lines cut from `data` (subclasses may take a faster route)."""
        decode = self._decode_line
        for raw in lines:
            record = decode(raw, len(raw) + 1)
            if type(record) is list:
                out.extend(record)
            else:
                out.append(record)

    def _decode_line(self, raw: bytes, size: int) -> Record | list[Record]:
        """One line's record (a list when one physical line holds two, e.g. a glued header)."""
        raise NotImplementedError


class WireDecoder(LineDecoder):
    """Feed bytes, get records. One decoder per byte stream (port or file)."""

    kind = "wire"

    def __init__(self, line: int = 0, offset: int = 0, segment: int = 0) -> None:
        super().__init__(line, offset)
        self.segment = segment
        self._segment_due = False
        self._set_clock(DEFAULT_CLOCK, DEFAULT_WRAP)

    def _set_clock(self, clock: str, wrap: int) -> None:
        self.clock, self.wrap = clock, wrap
        self._unit = CLOCK_UNITS_US[clock]
        self._limit = (1 << wrap) if wrap else 0
        self.unwrapper = Unwrapper(wrap, MAX_TIME_US // self._unit)

    def new_segment(self) -> None:
        """A reconnect: the next event starts a new clock segment with the clock in force,
        unless a header comes first (it starts its own)."""
        self._segment_due = True

    def state(self) -> dict[str, Any]:
        return {**super().state(), "segment": self.segment, "clock": self.clock, "wrap": self.wrap,
                "unwrap": self.unwrapper.state}

    def restore(self, state: dict[str, Any]) -> None:
        super().restore(state)
        self.segment = int(state["segment"])
        self._set_clock(state["clock"], int(state["wrap"]))
        self.unwrapper.restore(state["unwrap"])

    def _decode_lines(self, data: bytes, lines: list[bytes], out: list[Record]) -> None:
        """The common event line decoded inline, everything else by `_decode_line` (the same records).

        Inline only where `data` is ASCII and every header tag in it starts a line, so that no line needs the
        checks for those; an inline line is a plain event line whose word and arguments are cached as fitting."""
        if not data.isascii() or data.count(HEADER_TAG) != data.startswith(HEADER_TAG) + data.count(b"\n" + HEADER_TAG):
            super()._decode_lines(data, lines, out)
            return
        append, decode, make = out.append, self._decode_line, tuple.__new__  # make: Event without a Python frame
        names, args_cache, need_args = _NAME_CACHE, _ARGS_CACHE, _NEED_ARGS
        line, offset, segment, unit, limit, unwrap = (self.line, self.offset, self.segment, self._unit, self._limit,
                                                      self.unwrapper)
        top = MAX_TIME_US // unit
        fast = not self._segment_due
        for raw in lines:
            size = len(raw) + 1
            if fast and size <= MAX_LINE + 1 and raw[:1] != b"#" and raw[-1:] != b"\r":
                parts = raw.split(None, 2)
                if len(parts) >= 2 and parts[0].isdigit():
                    raw_time = int(parts[0])
                    name = names.get(parts[1])
                    if name is not None and raw_time < top and not (limit and raw_time >= limit):
                        if len(parts) == 2:
                            args: tuple[str, ...] | None = None if name in need_args else ()
                        else:
                            found = args_cache.get((name, parts[2]))
                            args = found[1] if found is not None and found[0] is None else None
                        if args is not None:
                            ticks = unwrap(raw_time)
                            if ticks is not None:
                                line += 1
                                append(make(Event, (ticks * unit, name, args, raw_time, segment, line, offset, size,
                                                    None, None, None)))
                                offset += size
                                continue
            self.line, self.offset = line, offset  # anything else, or a first sight: the full checks
            record = decode(raw, size)
            if type(record) is list:
                out.extend(record)
            else:
                append(record)
            line, offset, segment, unit, limit, unwrap = (self.line, self.offset, self.segment, self._unit,
                                                          self._limit, self.unwrapper)
            top = MAX_TIME_US // unit
            fast = not self._segment_due
        self.line, self.offset = line, offset

    def _decode_line(self, raw: bytes, size: int) -> Record | list[Record]:
        content = raw[:-1] if raw[-1:] == b"\r" else raw
        if len(content) > MAX_LINE:
            return self._malformed(raw[:MAX_LINE], self._overlong(size), size)
        raw = content
        at = raw.find(HEADER_TAG, 1)
        if at > 0 and not _is_note(raw[:at]):  # a board reset cut a line short and sent its header after it
            cut = self._malformed(raw[:at], "line cut short by a board reset (its header follows)", at)
            rest = self._decode_line(raw[at:], size - at)
            return [cut, *rest] if type(rest) is list else [cut, rest]
        if not raw.isascii():
            return self._malformed(raw, "not ASCII", size)
        self.line += 1
        line, offset = self.line, self.offset
        self.offset += size
        if raw[:1] == b"#":
            return self._decode_comment(raw, line, offset, size)
        parts = raw.split(None, 2)
        if len(parts) < 2:
            return Malformed(raw, "expected TIME EVENT [ARGS...]", line, offset, size)
        time_text = parts[0]
        if not time_text.isdigit():
            return Malformed(raw, "TIME is not an unsigned integer", line, offset, size)
        raw_time = int(time_text)
        if self._limit and raw_time >= self._limit:
            return Malformed(raw, f"TIME {raw_time} is not below 2^{self.wrap}", line, offset, size)
        if raw_time * self._unit >= MAX_TIME_US:
            return Malformed(raw, f"TIME {raw_time} is beyond 2^62 us", line, offset, size)
        name = _event_name(parts[1])
        if name is None:
            return Malformed(raw, "EVENT is not a word", line, offset, size)
        if len(parts) == 2:
            if name in _NEED_ARGS:
                return Malformed(raw, check_args(name, []) or "", line, offset, size)
            args: tuple[str, ...] = ()
        else:
            problem, args = _parse_args(name, parts[2])
            if problem:
                return Malformed(raw, problem, line, offset, size)
        if self._segment_due:
            self._segment_due = False
            self.segment += 1
            self.unwrapper = Unwrapper(self.wrap, MAX_TIME_US // self._unit)
        ticks = self.unwrapper(raw_time)
        if ticks is None:
            return Malformed(raw, f"TIME {raw_time} puts the unwrapped clock beyond 2^62 us", line, offset, size)
        return Event(ticks * self._unit, name, args, raw_time, self.segment, line, offset, size)

    def _decode_comment(self, raw: bytes, line: int, offset: int, size: int) -> Record:
        text = raw.decode("ascii")
        if not raw.startswith(HEADER_TAG):
            return Comment(text, line, offset, size)
        parsed = parse_header(text)
        if isinstance(parsed, str):
            return Malformed(raw, parsed, line, offset, size)
        version, clock, wrap, fields = parsed
        self._segment_due = False
        self.segment += 1
        self._set_clock(clock, wrap)
        return Header(version, clock, wrap, fields, self.segment, line, offset, size)


def _is_note(prefix: bytes) -> bool:
    """Does a line starting with `prefix` carry a note (whose text is kept verbatim, `#` and all)?"""
    parts = prefix.split(None, 2)
    return len(parts) >= 2 and parts[0].isdigit() and parts[1] == b"note"


def decode_all(data: bytes) -> list[Record]:
    """Decode a whole finished stream (a recorded session file)."""
    decoder = WireDecoder()
    return decoder.feed(data) + decoder.close()


def _token(value: object, what: str) -> str:
    text = str(value)
    if not text or any(c.isspace() for c in text) or not text.isascii():
        raise ValueError(f"{what} {text!r} must be one ASCII word")
    return text


def encode_header(
    clock: str = DEFAULT_CLOCK, wrap: int = DEFAULT_WRAP, **fields: object
) -> bytes:
    """A header line; extra keyword fields (fw, start, rig, ...) follow in order."""
    if clock not in CLOCK_UNITS_US:
        raise ValueError(f"clock must be one of {sorted(CLOCK_UNITS_US)}")
    items = [f"clock={clock}", f"wrap={int(wrap)}"]
    items += [f"{_token(k, 'key')}={_token(v, 'value')}" for k, v in fields.items()]
    return f"# rigside-wire {WIRE_VERSION} {' '.join(items)}\n".encode("ascii")


def encode_event(raw_time: int, name: str, *args: object) -> bytes:
    """One event line. Raises ValueError for what the decoder would reject."""
    if raw_time < 0:
        raise ValueError("TIME must be an unsigned integer")
    if not name.isascii() or not _WORD.match(name.encode("ascii")):
        raise ValueError(f"event {name!r} is not a word")
    if name == "note":
        text = " ".join(str(a) for a in args).strip()
        if not text.isascii() or "\n" in text or "\r" in text:
            raise ValueError("note text must be one line of ASCII")
        tokens = [text] if text else []
    else:
        tokens = [_token(_fmt(a), "argument") for a in args]
    problem = check_args(name, [t.encode("ascii") for t in tokens])
    if problem:
        raise ValueError(problem)
    line = " ".join([str(raw_time), name, *tokens]).encode("ascii")
    if len(line) > MAX_LINE:
        raise ValueError(f"line longer than {MAX_LINE} bytes")
    return line + b"\n"


def _fmt(value: object) -> str:
    if isinstance(value, float):
        return f"{value:.6g}"
    return str(value)
