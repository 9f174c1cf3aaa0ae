"""A recorded session's trials, builder counts and water, in one pass over its events.

Rule: the trials and counts are `TrialBuilder`'s (the live view's segmentation,
event by event, then flushed at the end), and the water is the sum of
`water_of` over the events in order (the rule `LiveStats` applies live), so a
session derived after the fact (an import, the report, a rebuild) gives what the
live view gave while it was recorded. Nothing else is computed: the live
figures (histograms, medians, the rolling rate) are the live view's business.
"""

from __future__ import annotations

import math
from collections.abc import Iterable
from typing import Any

from monitor.core.protocol import TrainingProtocol
from monitor.core.session.trials import Trial, TrialBuilder


def water_of(event: Any, protocol: TrainingProtocol, valve_ul_per_ms: float | None) -> float:
    """µL of water one event delivers: `reward UL`, a bare `reward` (the protocol's reward_ul), or `valve MS`
    times the calibration (when one is known); 0 for anything else or a value that is not a real volume."""
    name = getattr(event, "name", None)
    if name == "reward":
        args = event.args
        volume = float(args[0]) if args else protocol.reward_ul
    elif name == "valve" and valve_ul_per_ms is not None:
        volume = float(event.args[0]) * valve_ul_per_ms
    else:
        return 0.0
    return volume if volume is not None and math.isfinite(volume) and volume >= 0 else 0.0


def derive_session(protocol: TrainingProtocol, stage: str | None, valve_ul_per_ms: float | None, events: Iterable[Any]
                   ) -> tuple[list[Trial], dict[str, int], float]:
    """(trials, builder counts, water µL) of one session's events, in order."""
    builder = TrialBuilder(protocol, stage)
    feed = builder.feed
    trials: list[Trial] = []
    water = 0.0
    for event in events:
        new = feed(event)
        if new:
            trials.extend(new)
        name = getattr(event, "name", None)
        if name == "reward" or name == "valve":
            water += water_of(event, protocol, valve_ul_per_ms)
    trials.extend(builder.flush())
    return trials, dict(builder.counts), water
