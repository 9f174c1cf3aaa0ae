"""The slow-state fraction during a session, from the cached fit and each of the session's new trials, no refit.

Rule: each fit cached in the store carries the model's filter after the last
fitted session (monitor.store.consolidation_fits, "live"). When that
animal's session runs, the engine (its own thread) starts a copy of the
filter with the break since the fitted session ended (23 h when unknown, as
the fit assumes) and feeds it every completed trial of the protocol's final
stage once, in order, as the trial completes: y = log(interval / the trial's
target) and the rig's reward (monitor.core.consolidation.live, O(1) a
trial). A follower started part-way through a session (the fit arrived
later) first takes the session's trials so far, so no trial is ever missed;
the snapshot carries the fraction after the latest one and the GUI only
shows it. The parameters and the interval's width are the fit's; at
check-out the model is refitted. A model figure, advisory, like the fit it
comes from.
"""

from __future__ import annotations

import math
from collections.abc import Iterable

from monitor.core.consolidation.live import LiveFraction, restore_filter
from monitor.core.consolidation.words import fraction_text
from monitor.core.session.trials import Trial

DEFAULT_BREAK_H = 23.0  # when the fitted session's end is unknown (as the fit itself assumes)


class FractionFollower:
    """One session's slow-state fraction: a cached filter fed each completed trial of the final stage."""

    def __init__(self, cached: dict, final_stage: str, session_start_wall: float) -> None:
        self.filter = restore_filter(cached)
        ended = cached.get("ended_at")
        hours = (session_start_wall - ended) / 3600.0 if ended is not None else DEFAULT_BREAK_H
        self.filter.start_session(hours if hours > 0 else DEFAULT_BREAK_H)
        self.final_stage = final_stage
        self.fraction: LiveFraction | None = None   # None until a trial of the final stage was fed

    def add(self, trials: Iterable[Trial]) -> None:
        """Feed the completed trials of the final stage among `trials`, in order."""
        for trial in trials:
            if not trial.completed or trial.stage != self.final_stage:
                continue
            interval, target = trial.interval_ms, trial.target_ms
            y = math.log(interval / target) if interval > 0 and target > 0 else math.nan
            self.filter.add_trial(y, bool(trial.rewarded))
            self.fraction = self.filter.fraction()


def live_text(fraction: LiveFraction, fitted_session: object) -> str:
    """One sentence for the consolidation panel."""
    figure = fraction_text(fraction.estimate, fraction.low, fraction.high, fraction.status)
    return (f"This session so far: {figure} — the fit of session {fitted_session} followed through "
            f"{fraction.trials_since_fit} new trials, not refitted.")
