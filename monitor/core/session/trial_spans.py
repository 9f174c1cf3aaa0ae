"""Where each trial of a session begins and ends, for tables that need a span (NWB's trials table).

Rule: times are session-relative device µs (the trial segmentation's own
clock, monitor.core.session.trials). On a rig that frames trials, a trial begins at
its `trial_start` (the latest one at or before its first press that no
earlier trial began at); otherwise at its first press or crossing. It ends at
the rig's `outcome` for it (the first one at or after its last press and no
later than the next trial's first press); without one, at its last press
(first press + interval); a lone press or an omission without an outcome
ends when the protocol stopped waiting for a press: `timeout_us` after the
press (or the omitted trial's start). A span is never shorter than 1 µs (the device clock's resolution), so
no trial has start = stop.
"""

from __future__ import annotations

import bisect
import math
from typing import Callable, Sequence

from monitor.core.session.trials import Trial


def trial_spans(trials: Sequence[Trial], starts_us: Sequence[int], outcomes_us: Sequence[int],
                timeout_us: Callable[[Trial], float]) -> list[tuple[int, int]]:
    """(begin, end) in µs for each trial, in order; `starts_us`/`outcomes_us` are sorted event times."""
    spans: list[tuple[int, int]] = []
    floor = -1  # a trial_start used by the previous trial cannot open this one
    for k, trial in enumerate(trials):
        begin = trial.t_us
        i = bisect.bisect_right(starts_us, trial.t_us) - 1
        if i >= 0 and starts_us[i] > floor:
            begin = starts_us[i]
            floor = starts_us[i]
        last_press = trial.t_us + (trial.interval_ms * 1000 if math.isfinite(trial.interval_ms) else 0)
        limit = trials[k + 1].t_us if k + 1 < len(trials) else math.inf
        j = bisect.bisect_left(outcomes_us, math.ceil(last_press))
        if j < len(outcomes_us) and outcomes_us[j] <= limit:
            end = outcomes_us[j]
        elif last_press > trial.t_us:
            end = round(last_press)
        else:
            end = round(trial.t_us + timeout_us(trial))
        spans.append((begin, max(end, begin + 1)))
    return spans
