"""The session clock on whole blocks of events: the rule worked by hand, the same answer however the events are
cut into blocks, and texts equal to what Python's own formatting and datetime write for each time."""

from __future__ import annotations

import random
from datetime import datetime, timedelta

import numpy as np

from monitor.store.session_time import SECONDS, WALL, SessionClock, seconds_parts, wall_clock_parts


def test_a_board_reset_continues_from_the_last_time_seen():
    # worked by hand from the rule (docs/export.md): times count from the first event; a new segment starts at
    # the latest time seen so far, even when its counter starts lower or an earlier segment comes back
    t_us = np.array([5_000, 9_000, 7_000, 2_000, 4_000, 1_000, 3_000])
    segment = np.array([0, 0, 0, 1, 1, 0, 0])
    assert SessionClock().relative(t_us, segment).tolist() == [0, 4_000, 2_000, 4_000, 6_000, 6_000, 8_000]


def test_any_cut_into_blocks_gives_the_same_times():
    rng = random.Random(7)
    for _ in range(200):
        n = rng.randint(1, 80)
        segment = np.array(sorted(rng.randint(0, 3) for _ in range(n)) if rng.random() < 0.5
                           else [rng.randint(0, 2) for _ in range(n)])
        t_us = np.array([rng.randint(0, 10**9) for _ in range(n)])
        whole = SessionClock().relative(t_us, segment).tolist()
        clock, parts, start = SessionClock(), [], 0
        for cut in sorted(rng.sample(range(n + 1), min(4, n + 1))) + [n]:
            parts.append(clock.relative(t_us[start:cut], segment[start:cut]))
            start = cut
        assert np.concatenate(parts).tolist() == whole


def test_texts_equal_pythons_formatting_of_each_time():
    session_us = np.array([0, 5, -5, 999_999, 1_000_000, -1_234_567, 86_400_000_001, 10**12 + 7])
    # Python's float formatting and datetime arithmetic, one value at a time (the outside reference)
    assert [SECONDS % p for p in zip(*seconds_parts(session_us))] == [f"{us / 1e6:.6f}" for us in session_us]
    for start in ("2026-03-28T09:00:00+01:00", "2026-02-04T08:57:50.250000-05:30", "2026-12-31T23:59:59+00:00",
                  "1969-12-31T23:59:59.999999", "2024-02-28T23:00:00+14:00"):
        moment = datetime.fromisoformat(start)
        assert [WALL % parts for parts in zip(*wall_clock_parts(moment, session_us))] == [
            (moment + timedelta(microseconds=int(us))).isoformat(timespec="microseconds") for us in session_us]
