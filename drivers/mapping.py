"""A lab's own delimited line format, read through a TOML mapping file.

Rule: the mapping (docs/mapping.md) turns each data line into the same
records the wire decoder makes, with the same line splitting, positions and
malformed-line handling (`drivers.wire.LineDecoder`). Codes the mapping does
not list become events under the lab's own code, kept and counted as unknown.
Files holding several animals or sessions get one clock (unwrap state and
segment number) per (animal, session) pair. Wall times without an offset are
read in the mapping's `timezone`, else in this PC's. A mistake in the mapping
file raises `ConfigError` naming file, line and key; the only error `feed` can
raise is a header line that lacks a column the mapping names.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import datetime
from pathlib import Path
from typing import Any
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

from drivers.clock import Unwrapper
from drivers.config import ConfigError, TomlFile
from drivers.wire import EVENT_SPECS, KNOWN_EVENTS, MAX_TIME_US, Comment, Event, LineDecoder, Record, check_args

UNITS_US = {"us": 1, "ms": 1000, "s": 1_000_000}
ROLES_REQUIRED = ("device_time", "event")
ROLES_OPTIONAL = ("wall_time", "value", "animal", "session")


@dataclass(frozen=True)
class Mapping:
    """A parsed mapping file."""

    path: str
    delimiter: str | None  # None: runs of blanks
    header: bool
    comment: str | None
    timezone: str | None
    columns: dict[str, str | int]  # role -> column name or 0-based index
    unit: str
    wrap_bits: int
    events: dict[str, str]  # lab code -> wire event name


def parse_mapping(text: str, path: str = "<mapping>") -> Mapping:
    """Parse mapping TOML text; `ConfigError` names file, line and key."""
    doc = TomlFile(text, path)
    for table, allowed in (
        ("format", {"delimiter", "header", "comment", "timezone"}),
        ("columns", set(ROLES_REQUIRED + ROLES_OPTIONAL)),
        ("clock", {"unit", "wrap_bits"}),
    ):
        doc.check_keys(table, allowed)
    for table in doc.data:
        if table not in ("format", "columns", "clock", "events"):
            raise doc.error("", table, "unknown table (expected format, columns, clock, events)")

    delimiter = doc.get("format", "delimiter", str, check=_check_delimiter)
    header = doc.get("format", "header", bool, default=False)
    comment = doc.get("format", "comment", str, default=None, check=lambda v: None if v else "must not be empty")
    timezone = doc.get("format", "timezone", str, default=None, check=_check_timezone)

    columns: dict[str, str | int] = {}
    for role in ROLES_REQUIRED + ROLES_OPTIONAL:
        default = ... if role in ROLES_REQUIRED else None
        value = doc.get("columns", role, (str, int), default=default, check=_check_column)
        if value is not None:
            if isinstance(value, str) and not header:
                raise doc.error("columns", role, f"column name {value!r} needs [format] header = true (or use a 0-based index)")
            columns[role] = value

    unit = doc.get("clock", "unit", str, check=lambda v: None if v in UNITS_US else "expected us, ms or s")
    wrap_bits = doc.get("clock", "wrap_bits", int, default=0, check=lambda v: None if 0 <= v <= 64 else "expected 0-64")

    events: dict[str, str] = {}
    for code, name in doc.table("events").items():
        if not isinstance(name, str) or name not in KNOWN_EVENTS:
            raise doc.error("events", code, f"{name!r} is not a wire-format event (one of: {', '.join(sorted(KNOWN_EVENTS))})")
        events[code] = name
    return Mapping(path, None if delimiter == "whitespace" else delimiter, header, comment, timezone, columns, unit, wrap_bits, events)


def load_mapping(path: str | Path) -> Mapping:
    """Read and parse a mapping file."""
    try:
        text = Path(path).read_text(encoding="utf-8")
    except OSError as exc:
        raise ConfigError(str(path), None, "", f"cannot read mapping file ({exc.strerror})") from None
    return parse_mapping(text, str(path))


def _check_delimiter(value: str) -> str | None:
    if value in ("\n", "\r"):
        return "a line end cannot separate fields: expected a single character such as \";\" or \"whitespace\""
    if value == "whitespace" or len(value) == 1:
        return None
    return 'expected a single character or "whitespace"'


def _check_timezone(value: str) -> str | None:
    try:
        ZoneInfo(value)
    except (ZoneInfoNotFoundError, ValueError):
        return f"unknown time zone {value!r} (expected an IANA name such as Europe/Berlin)"
    return None


def _check_column(value: str | int) -> str | None:
    if isinstance(value, int) and value < 0:
        return "a column index is 0-based and not negative"
    if isinstance(value, str) and not value:
        return "a column name must not be empty"
    return None


class MappedDecoder(LineDecoder):
    """Feed bytes of a mapped file, get wire records (events carry animal/session)."""

    max_line = 4096
    kind = "mapped"

    def __init__(self, mapping: Mapping, line: int = 0, offset: int = 0) -> None:
        super().__init__(line, offset)
        self.mapping = mapping
        self._factor = UNITS_US[mapping.unit]
        self._limit = (1 << mapping.wrap_bits) if mapping.wrap_bits else 0
        self._zone = ZoneInfo(mapping.timezone) if mapping.timezone else None
        self._needs_header = mapping.header
        self._index: dict[str, int] = {r: c for r, c in mapping.columns.items() if isinstance(c, int)}
        self._clocks: dict[tuple[str | None, str | None], tuple[int, Unwrapper]] = {}

    @property
    def segments(self) -> dict[tuple[str | None, str | None], int]:
        """Segment number of each (animal, session) seen so far."""
        return {key: seg for key, (seg, _) in self._clocks.items()}

    def state(self) -> dict[str, Any]:
        clocks = [[animal, session, segment, unwrap.state] for (animal, session), (segment, unwrap) in self._clocks.items()]
        return {**super().state(), "needs_header": self._needs_header, "index": dict(self._index), "clocks": clocks}

    def restore(self, state: dict[str, Any]) -> None:
        super().restore(state)
        self._needs_header = bool(state["needs_header"])
        self._index = {role: int(col) for role, col in state["index"].items()}
        self._clocks = {}
        for animal, session, segment, unwrap_state in state["clocks"]:
            unwrap = Unwrapper(self.mapping.wrap_bits, int(MAX_TIME_US // self._factor))
            unwrap.restore(unwrap_state)
            self._clocks[(animal, session)] = (int(segment), unwrap)

    def _split(self, text: str) -> list[str]:
        delim = self.mapping.delimiter
        return text.split() if delim is None else [f.strip() for f in text.split(delim)]

    def _decode_line(self, raw: bytes, size: int) -> Record:
        content = raw[:-1] if raw.endswith(b"\r") else raw
        if len(content) > self.max_line:
            return self._malformed(raw[: self.max_line], self._overlong(size), size)
        try:
            text = content.decode("utf-8")
        except UnicodeDecodeError:
            return self._malformed(content, "not UTF-8 text", size)
        comment = self.mapping.comment
        if not text.strip() or (comment and text.lstrip().startswith(comment)):
            line, offset = self._position(size)
            return Comment(text, line, offset, size)
        if self._needs_header:
            self._read_header(text)
            line, offset = self._position(size)
            return Comment(text, line, offset, size)
        return self._decode_fields(content, self._split(text), size)

    def _read_header(self, text: str) -> None:
        names = self._split(text)
        for role, column in self.mapping.columns.items():
            if isinstance(column, str):
                if column not in names:
                    raise ConfigError(
                        self.mapping.path, None, f"[columns] {role}",
                        f"column {column!r} is not in the file's header line ({', '.join(names)})",
                    )
                self._index[role] = names.index(column)
        self._needs_header = False

    def _decode_fields(self, raw: bytes, fields: list[str], size: int) -> Record:
        def field(role: str) -> str | None:
            index = self._index.get(role)
            return None if index is None or index >= len(fields) else fields[index]

        for role in ROLES_REQUIRED:
            if field(role) is None:
                return self._malformed(raw, f"{len(fields)} fields: no {role} column (field {self._index[role] + 1})", size)
        time_text, code = field("device_time"), field("event")
        assert time_text is not None and code is not None
        ticks = self._parse_time(time_text)
        if isinstance(ticks, str):
            return self._malformed(raw, ticks, size)
        wall = field("wall_time")
        wall_iso = None
        if wall:
            wall_iso = self._parse_wall(wall)
            if wall_iso is None:
                return self._malformed(raw, f"wall time {wall!r} is not ISO 8601", size)
        if not code:
            return self._malformed(raw, "empty event code", size)
        name = self.mapping.events.get(code, code)
        value = field("value") or ""
        args: tuple[str, ...] = ()
        spec = EVENT_SPECS.get(name)
        if value and (spec is None or spec[1] >= 1):
            args = (value,)
            problem = check_args(name, [value.encode("utf-8")])
            if problem:
                return self._malformed(raw, problem, size)
        elif spec is not None and spec[0] > 0:
            return self._malformed(raw, check_args(name, []) or "missing value", size)
        animal, session = field("animal") or None, field("session") or None
        segment, unwrap = self._clock(animal, session)
        raw_time = int(ticks)
        if isinstance(ticks, int):
            unwrapped = unwrap(raw_time)
            if unwrapped is None:
                return self._malformed(raw, f"device time {raw_time} puts the unwrapped clock beyond 2^62 us", size)
            t_us = unwrapped * self._factor
        else:
            t_us = round(ticks * self._factor)
        line, offset = self._position(size)
        return Event(t_us, name, args, raw_time, segment, line, offset, size, wall_iso, animal, session)

    def _parse_time(self, text: str) -> int | float | str:
        if text.isdigit():
            value = int(text)
            if self._limit and value >= self._limit:
                return f"device time {value} is not below 2^{self.mapping.wrap_bits}"
            if value * self._factor >= MAX_TIME_US:
                return f"device time {value} is beyond 2^62 us"
            return value
        if not self._limit:
            try:
                value_f = float(text)
            except ValueError:
                pass
            else:
                if 0 <= value_f * self._factor < MAX_TIME_US:
                    return value_f
        return f"device time {text!r} is not an unsigned number"

    def _parse_wall(self, text: str) -> str | None:
        try:
            stamp = datetime.fromisoformat(text)
        except ValueError:
            return None
        if stamp.tzinfo is None:
            stamp = stamp.replace(tzinfo=self._zone) if self._zone else stamp.astimezone()
        return stamp.isoformat()

    def _clock(self, animal: str | None, session: str | None) -> tuple[int, Unwrapper]:
        key = (animal, session)
        clock = self._clocks.get(key)
        if clock is None:
            clock = (len(self._clocks) + 1, Unwrapper(self.mapping.wrap_bits, int(MAX_TIME_US // self._factor)))
            self._clocks[key] = clock
        return clock
