"""A lab's own line format through a TOML mapping (docs/mapping.md)."""

from __future__ import annotations

import pytest

from drivers.config import ConfigError
from drivers.mapping import MappedDecoder, load_mapping, parse_mapping
from drivers.wire import Comment, Event, Malformed

CONTRACT_MAPPING = """\
[format]
delimiter = ";"          # any single character; "whitespace" for runs of blanks
header = true            # the first line names the columns
comment = "#"
timezone = "Europe/Berlin"

[columns]
device_time = "ctr_us"
wall_time = "host_time"
event = "code"
value = "arg"
animal = "subject"
session = "run"

[clock]
unit = "us"
wrap_bits = 32

[events]
LP = "lever_down"
LR = "lever_up"
RW = "reward"
"""

LOG = (
    "host_time;ctr_us;code;arg;subject;run\n"
    "# exported by the box PC\n"
    "2026-03-02T09:14:03;4294966000;LP;1;wren;1\n"
    "2026-03-02T09:14:03;500;LR;1;wren;1\n"          # counter wrapped: 1796 us after the press
    "2026-03-02T09:20:00;100;LP;1;teal;4\n"          # another animal, its own clock
    "2026-03-02T09:20:01;700100;RW;25;teal;4\n"
    "2026-07-01T10:00:00+00:00;700200;DOOR;;teal;4\n"  # unknown code, explicit offset
    "not;enough\n"
).encode()


def decode(data: bytes, mapping_text: str = CONTRACT_MAPPING, chunk: int = 0) -> list:
    decoder = MappedDecoder(parse_mapping(mapping_text, "lab.toml"))
    if not chunk:
        return decoder.feed(data) + decoder.close()
    out = []
    for i in range(0, len(data), chunk):
        out += decoder.feed(data[i : i + chunk])
    return out + decoder.close()


@pytest.mark.parametrize("chunk", [0, 1, 7])
def test_contract_example_with_wrap_several_animals_and_time_zone(chunk):
    records = decode(LOG, chunk=chunk)
    assert isinstance(records[0], Comment) and isinstance(records[1], Comment)
    press, release, teal_press, teal_reward, door, bad = records[2:]
    assert (press.name, press.animal, press.session, press.args) == ("lever_down", "wren", "1", ("1",))
    assert release.t_us - press.t_us == 1796  # (2^32 - 4294966000) + 500: unwrapped across the wrap
    # Berlin is UTC+1 on 2 March (CET; IANA tz database)
    assert press.wall_time == "2026-03-02T09:14:03+01:00"
    assert teal_press.segment != press.segment and teal_press.t_us == 100
    assert teal_reward.name == "reward" and teal_reward.args == ("25",)
    assert door.name == "DOOR" and door.wall_time == "2026-07-01T10:00:00+00:00"
    assert isinstance(bad, Malformed) and bad.raw == b"not;enough" and bad.line == 8


def test_whitespace_delimiter_index_columns_and_seconds():
    mapping = """
[format]
delimiter = "whitespace"
[columns]
device_time = 0
event = 1
value = 2
[clock]
unit = "s"
[events]
press = "lever_down"
drink = "lick"
"""
    records = decode(b"0.5   press 2\n1.25 drink\n", mapping)
    assert [(r.name, r.t_us, r.args) for r in records] == [("lever_down", 500_000, ("2",)), ("lick", 1_250_000, ())]


@pytest.mark.parametrize(
    "edit, line, key",
    [
        (lambda t: t.replace('event = "code"\n', ""), 7, "[columns] event"),  # the table's line
        (lambda t: t.replace('LR = "lever_up"', 'LR = "lever_upp"'), 21, "[events] LR"),
        (lambda t: t.replace('unit = "us"', 'unit = "minutes"'), 16, "[clock] unit"),
        (lambda t: t.replace('delimiter = ";" ', 'delimiter = ";;"'), 2, "[format] delimiter"),
        (lambda t: t.replace("wrap_bits = 32", "wrap_bit = 32"), 17, "[clock] wrap_bit"),
        (lambda t: t.replace('timezone = "Europe/Berlin"', 'timezone = "Mars/Olympus"'), 5, "[format] timezone"),
        (lambda t: t.replace("header = true ", "header = false"), 8, "[columns] device_time"),
        (lambda t: t.replace("[events]", "[events"), 19, ""),
    ],
)
def test_bad_mapping_names_file_line_and_key(edit, line, key):
    with pytest.raises(ConfigError) as caught:
        parse_mapping(edit(CONTRACT_MAPPING), "lab.toml")
    err = caught.value
    assert err.path == "lab.toml" and err.line == line and err.key == key
    assert str(err).startswith(f"lab.toml:{line}:" if line else "lab.toml:")


def test_missing_column_in_header_line_is_a_config_error():
    decoder = MappedDecoder(parse_mapping(CONTRACT_MAPPING, "lab.toml"))
    with pytest.raises(ConfigError, match="'ctr_us' is not in the file's header line"):
        decoder.feed(b"host_time;counter;code;arg;subject;run\n")


def test_load_mapping_reports_unreadable_file(tmp_path):
    with pytest.raises(ConfigError, match="cannot read mapping file"):
        load_mapping(tmp_path / "absent.toml")
    path = tmp_path / "lab.toml"
    path.write_text(CONTRACT_MAPPING)
    assert load_mapping(path).events["RW"] == "reward"


def test_bad_values_are_malformed_lines_not_errors():
    records = decode(
        b"host_time;ctr_us;code;arg;subject;run\n"
        b"yesterday;5;LP;1;wren;1\n"
        b"2026-03-02T09:14:03;x5;LP;1;wren;1\n"
        b"2026-03-02T09:14:03;99999999999;LP;1;wren;1\n"
        b"2026-03-02T09:14:03;5;RW;lots;wren;1\n"
        b"2026-03-02T09:14:03;6;LP;1;wren;1\n"
    )
    assert [type(r) for r in records[1:]] == [Malformed] * 4 + [Event]
    assert "ISO 8601" in records[1].reason and "2^32" in records[3].reason
