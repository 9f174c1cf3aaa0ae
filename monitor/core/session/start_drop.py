"""Start-of-session drop: how much worse a session starts than the previous one ended.

Rule: for a yes/no figure per trial (a hit, or an interval inside the fixed
window), given per session in time order (the caller leaves excluded sessions
out; sessions with no trials are skipped): the proportion over the previous
session's last `window` trials minus the proportion over this session's
`window` trials after its first `warmup` (the warm-up is set apart, it is its
own phenomenon). Positive = worse at the start. The 95 % interval of the
difference is Newcombe's hybrid score interval (`binomial.newcombe_difference`).
A session with no trial after its warm-up has no drop. Two figures use it,
both over the completed trials (core.session.trials.Trial) of the protocol's
final stage: the hit rate
(`hit_rate_drops`, the animal page) and the fraction of intervals inside the
stage's fixed window (`fixed_window_drops`, the per-animal report's
`start_drop` and the eligibility measure of that name). The module imports
nothing of the protocol, so the ui's view models may name `StartDrop`.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

from monitor.core.session.binomial import newcombe_difference

WARMUP_TRIALS = 5
WINDOW_TRIALS = 20


@dataclass(frozen=True)
class StartDrop:
    """Drop in performance at one session's start, warm-up trials set apart."""

    session: int
    drop: float  # end of previous session minus start of this one
    low: float
    high: float
    warmup_trials: int


def start_drops(sessions: Sequence[tuple[int, Sequence[bool]]], warmup: int = WARMUP_TRIALS,
                window: int = WINDOW_TRIALS) -> tuple[StartDrop, ...]:
    """One drop per session after the first that has trials; `sessions` is (index, per-trial yes/no)."""
    kept = [(index, list(flags)) for index, flags in sessions if len(flags)]
    drops = []
    for (_, before), (index, now) in zip(kept[:-1], kept[1:]):
        end, start = before[-window:], now[warmup:warmup + window]
        if end and start:
            d, low, high = newcombe_difference(sum(end), len(end), sum(start), len(start))
            drops.append(StartDrop(index, d, low, high, warmup))
    return tuple(drops)


def hit_rate_drops(final_stage: str, sessions: Sequence[tuple[int, Sequence[Any]]]) -> tuple[StartDrop, ...]:
    """Drops of the final stage's hit rate; `sessions` is (index, trials) of the included sessions."""
    return start_drops([(index, [t.rewarded for t in trials if t.completed and t.stage == final_stage])
                        for index, trials in sessions])


def fixed_window_drops(final_stage: str, window: tuple[float, float],
                       sessions: Sequence[tuple[int, Sequence[Any]]]) -> tuple[StartDrop, ...]:
    """Drops of the final stage's fraction of intervals inside its fixed `window` (ms); `sessions` as in
    `hit_rate_drops`."""
    low, high = window
    return start_drops([(index, [low <= t.interval_ms <= high for t in trials
                                 if t.completed and t.stage == final_stage and math.isfinite(t.interval_ms)])
                        for index, trials in sessions])
