"""The slow-state fraction during a session, from the cached fit and the session's new trials, without a refit.

Rule: each fit cached in the store carries the model's filter after the last
fitted session (monitor.store.consolidation_fits, "live"). When that
animal's session runs, a copy of the filter starts the session with the break
since the fitted session ended, and every completed trial of the protocol's
final stage is fed to it once, in order: y = log(interval / target) and the
rig's reward (monitor.core.consolidation.live, O(1) a trial). Trials come
from the engine's snapshot: its count of the stage's trials and the last
intervals and outcomes it keeps; trials that arrived between two looks beyond
what the snapshot keeps are counted as missed, and the text says so. The
parameters and the interval's width are the fit's; at check-out the model is
refitted. A model figure, advisory, like the fit it comes from.
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass

import numpy as np

from monitor.core.consolidation.words import fraction_text
from monitor.core.consolidation.live import LiveFilter, LiveFraction, restore_filter
from monitor.core.session.live_stats import LiveSnapshot

DEFAULT_BREAK_H = 23.0  # when the fitted session's end is unknown (as the fit itself assumes)


@dataclass
class _Run:
    session_id: int
    stage: str
    filter: LiveFilter
    fed: int = 0          # stage trials the filter has taken
    missed: int = 0       # trials that came and went between two looks
    fraction: LiveFraction | None = None


class LiveFractions:
    """One filter per animal in a session; `update` after each snapshot."""

    def __init__(self) -> None:
        self._runs: dict[str, _Run] = {}

    def update(self, animal: str, session_id: int, snapshot: LiveSnapshot | None, cached: dict | None,
               final_stage: str, session_start_wall: float) -> tuple[LiveFraction, int] | None:
        """The fraction after the session's latest trial and the trials missed, or None when there is nothing
        to follow (no cached filter, not the final stage, no trial yet). The same objects until a trial is fed."""
        if cached is None or snapshot is None or snapshot.stage != final_stage:
            return None
        run = self._runs.get(animal)
        if run is None or run.session_id != session_id or run.stage != snapshot.stage:
            live = restore_filter(cached)
            ended = cached.get("ended_at")
            hours = (session_start_wall - ended) / 3600.0 if ended is not None else DEFAULT_BREAK_H
            live.start_session(hours if hours > 0 else DEFAULT_BREAK_H)
            run = self._runs[animal] = _Run(session_id, snapshot.stage, live)
        new = snapshot.stage_trials - run.fed
        if new > 0:
            intervals = np.asarray(snapshot.recent_intervals_ms, float)
            hits = np.asarray(snapshot.recent_hits, bool)
            take = min(new, len(intervals))
            for interval, hit in zip(intervals[len(intervals) - take:], hits[len(hits) - take:]):
                y = math.log(interval / snapshot.target_ms) if interval > 0 and snapshot.target_ms > 0 else math.nan
                run.filter.add_trial(y, bool(hit))
            run.missed += new - take
            run.fed = snapshot.stage_trials
            run.fraction = run.filter.fraction()
        return (run.fraction, run.missed) if run.fraction is not None else None

    def forget(self, animal: str) -> None:
        """The session ended (or the fit changed): start afresh next time."""
        self._runs.pop(animal, None)


def session_start_wall(started_monotonic: float | None) -> float:
    """Wall-clock seconds of a session start given on the monotonic clock (now when unknown)."""
    now = time.time()
    return now if started_monotonic is None else now - (time.monotonic() - started_monotonic)


def live_text(fraction: LiveFraction, missed: int, fitted_session: object) -> str:
    """One sentence for the consolidation panel."""
    extra = f"; {missed} trials came too fast to follow" if missed else ""
    figure = fraction_text(fraction.estimate, fraction.low, fraction.high, fraction.status)
    return (f"This session so far: {figure} — the fit of session {fitted_session} followed through "
            f"{fraction.trials_since_fit} new trials, not refitted{extra}.")
