"""Device counter unwrap and device-to-host alignment (drivers/clock.py)."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st

from drivers.clock import Unwrapper
from drivers.wire import decode_all, encode_event, encode_header

PERIOD_32 = 2**32  # a 32-bit us counter wraps every 2^32 us = 4294.967296 s (datasheet fact, REFERENCES.md)


def test_unwrap_across_several_wraps():
    unwrap = Unwrapper(32)
    true_times = np.arange(0, 5 * PERIOD_32, 700_000_123, dtype=np.int64)  # ~12 min steps over 6 h
    got = [unwrap(int(t) % PERIOD_32) for t in true_times]
    assert got == true_times.tolist()
    assert got[-1] > 4 * PERIOD_32


def test_wrap_period_in_seconds():
    # 2^32 us = 4294.967296 s = 71.58 min (microcontroller datasheets; REFERENCES.md)
    assert PERIOD_32 / 1e6 == pytest.approx(4294.967296)
    unwrap = Unwrapper(32)
    assert unwrap(PERIOD_32 - 1) == PERIOD_32 - 1
    assert unwrap(0) == PERIOD_32  # one tick later, across the wrap


def test_small_backward_steps_stay_in_place():
    unwrap = Unwrapper(32)
    # lines logged a few ms out of order around a wrap
    raw = [PERIOD_32 - 10_000, PERIOD_32 - 2_000, PERIOD_32 - 5_000, 1_000, PERIOD_32 - 500, 4_000]
    got = [unwrap(r) for r in raw]
    assert got == [PERIOD_32 - 10_000, PERIOD_32 - 2_000, PERIOD_32 - 5_000, PERIOD_32 + 1_000,
                   PERIOD_32 - 500, PERIOD_32 + 4_000]


@given(st.lists(st.integers(min_value=-(2**15) + 1, max_value=2**15 - 1), min_size=1, max_size=200),
       st.integers(min_value=0, max_value=2**16 - 1))
def test_unwrap_recovers_any_walk_with_steps_under_half_a_period(steps, start):
    unwrap = Unwrapper(16)
    true = start
    assert unwrap(true % 2**16) == start
    for step in steps:
        true += step
        assert unwrap(true % 2**16) == true


def test_no_wrap_counter_passes_through():
    unwrap = Unwrapper(0)
    assert [unwrap(v) for v in (5, 2**40, 3)] == [5, 2**40, 3]


def test_state_round_trip_resumes_exactly():
    a = Unwrapper(32)
    for r in (PERIOD_32 - 5, 10, 20):
        a(r)
    b = Unwrapper(32)
    b.restore(a.state)
    assert b(30) == a(30) == PERIOD_32 + 30


def test_reset_mid_stream_starts_a_new_segment():
    data = (
        encode_header(fw="box-v3") + encode_event(PERIOD_32 - 100, "lick") + encode_event(50, "lick")
        + encode_header(fw="box-v3")  # board reset: counter restarts near zero
        + encode_event(3, "lick") + encode_event(10, "lick")
    )
    _, a, b, _, c, d = decode_all(data)
    assert b.t_us - a.t_us == 150 and b.segment == 1
    assert (c.segment, c.t_us, d.t_us) == (2, 3, 10)  # not read as a backward step of the old clock
