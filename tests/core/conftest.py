"""Shared helpers for the analysis-core tests: protocols and event streams of our own."""

from __future__ import annotations

import pytest

from drivers.wire import Event, decode_all
from monitor.core.protocol import parse_protocol

BASIC = """
[protocol]
name = "two-press 700 ms"
version = 2
task = "two_press"
target_ms = 700
tolerance = 0.2
trial_timeout_ms = 3000

[plateau]
rule = "consecutive_sessions"
min_hit_rate = 0.5
sessions = 3
min_trials = 10
"""


@pytest.fixture
def basic():
    return parse_protocol(BASIC, "basic.toml")


@pytest.fixture(scope="session")
def basic_text():
    return BASIC


def make_stream(*items, header: bool = False) -> bytes:
    """Wire bytes from (time_ms, name, *args) tuples; the string "RESET" starts a new clock segment."""
    from drivers.wire import encode_event, encode_header

    out = [encode_header(fw="test-v1")] if header else []
    for item in items:
        if item == "RESET":
            out.append(encode_header(fw="test-v1"))
            continue
        t_ms, name, *args = item
        out.append(encode_event(round(t_ms * 1000), name, *args))
    return b"".join(out)


def make_events(*items) -> list[Event]:
    return [r for r in decode_all(make_stream(*items)) if isinstance(r, Event)]


@pytest.fixture(scope="session")
def stream():
    """(time_ms, name, *args) tuples, or "RESET" -> wire bytes."""
    return make_stream


@pytest.fixture(scope="session")
def events():
    """(time_ms, name, *args) tuples, or "RESET" -> decoded Events."""
    return make_events
