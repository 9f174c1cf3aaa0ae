"""Live statistics of one session: what the trainer watches, updated per event.

Rule: `LiveStats` takes trials (from `TrialBuilder`) and the other events
(licks, rewards, valves) one at a time in O(1) (the two exact medians cost
O(log n)); `snapshot()` returns an immutable `LiveSnapshot` (numpy arrays are
read-only copies). Session totals (trials, hits, lone / premature / omitted
attempts, rewards, licks, water) run over the whole session; the interval
figures (histograms, rolling hit rate, median, CV, fixed-window fraction,
median absolute log error) describe the stage in force and restart when the
stage changes, so stages never mix silently. Only completed trials with an
interval enter the interval figures. Water: a `reward UL` event adds UL, a bare
`reward` adds the protocol's reward_ul, a `valve MS` event adds MS x the
calibration (µL/ms) when one is given. After each completed trial the rolling
hit rate and its interval are appended to an append-only series
(`rate_series()`: a published view never changes afterwards), the one source
of the rolling hit rate over the session. `LiveSession` wires a builder to it.
"""

from __future__ import annotations

import math
from collections.abc import Iterable
from typing import Any, NamedTuple

import numpy as np

from monitor.core.session.derivation import water_of
from monitor.core.session.histogram import HistogramSnapshot, IntervalHistograms, linear_edges, log_edges
from monitor.core.protocol import TrainingProtocol
from monitor.core.session.rolling import RollingRate, RunningMedian, RunningMoments, WindowMedian
from monitor.core.session.trials import Trial, TrialBuilder

DEFAULT_WINDOW = 100  # trials in the rolling figures
LINEAR_BINS = 60
LOG_BINS = 60


class LiveSnapshot(NamedTuple):
    """The session's figures at one moment (immutable)."""

    stage: str
    target_ms: float
    window_low_ms: float
    window_high_ms: float
    trials: int
    hits: int
    hit_rate: float
    lone: int
    premature: int
    omission: int
    rolling_trials: int
    rolling_hits: int
    rolling_hit_rate: float
    rolling_low: float
    rolling_high: float
    fixed_window_fraction: float
    median_interval_ms: float
    rolling_median_ms: float
    cv: float
    median_abs_log_error: float
    rewards: int
    licks: int
    water_ul: float
    linear: HistogramSnapshot
    log: HistogramSnapshot
    recent_intervals_ms: np.ndarray  # the last `window` stage intervals, oldest first
    recent_hits: np.ndarray


class RateSeries(NamedTuple):
    """Rolling hit rate after each completed trial of the session (read-only arrays, same length)."""

    trial: np.ndarray
    rate: np.ndarray
    low: np.ndarray
    high: np.ndarray


class _RateTrace:
    """Append-only buffers; a published view of the first n entries never changes afterwards."""

    def __init__(self) -> None:
        self._data = np.empty((4, 256))
        self.count = 0

    def append(self, trial: int, rate: float, low: float, high: float) -> None:
        if self.count == self._data.shape[1]:
            grown = np.empty((4, 2 * self.count))
            grown[:, :self.count] = self._data
            self._data = grown
        self._data[:, self.count] = (trial, rate, low, high)
        self.count += 1

    def view(self) -> RateSeries:
        parts = []
        for row in self._data[:, :self.count]:
            part = row.view()
            part.flags.writeable = False
            parts.append(part)
        return RateSeries(*parts)


class _StageFigures:
    """The interval figures of one stage (restarted at a stage change)."""

    def __init__(self, stage: str, fixed: tuple[float, float], window: int, linear: np.ndarray,
                 log: np.ndarray, previous: Iterable[float]) -> None:
        previous = list(previous)
        self.stage = stage
        self.fixed_low, self.fixed_high = fixed
        self.rolling = RollingRate(window)
        self.rolling_median = WindowMedian(window)
        self.median = RunningMedian()
        self.moments = RunningMoments()
        self.log_error = RunningMedian()
        self.in_fixed = 0
        self.linear = IntervalHistograms(linear, previous)
        self.log = IntervalHistograms(log, previous)
        self.recent = np.full(window, np.nan)
        self.recent_hit = np.zeros(window, dtype=bool)
        self.recent_count = 0

    def add(self, trial: Trial) -> None:
        interval = trial.interval_ms
        self.rolling.add(trial.rewarded)
        slot = self.recent_count % len(self.recent)
        self.recent[slot] = interval
        self.recent_hit[slot] = trial.rewarded
        self.recent_count += 1
        if not math.isfinite(interval):
            return
        self.rolling_median.add(interval)
        self.median.add(interval)
        self.moments.add(interval)
        self.in_fixed += self.fixed_low <= interval <= self.fixed_high
        if interval > 0 and trial.target_ms > 0:
            self.log_error.add(abs(math.log(interval / trial.target_ms)))
        self.linear.add(interval)
        self.log.add(interval)

    def recent_arrays(self) -> tuple[np.ndarray, np.ndarray]:
        size = len(self.recent)
        count = min(self.recent_count, size)
        order = (np.arange(count) + self.recent_count - count) % size
        intervals, hits = self.recent[order], self.recent_hit[order]
        intervals.flags.writeable = hits.flags.writeable = False
        return intervals, hits


class LiveStats:
    """Session totals and the stage's interval figures, fed one record at a time."""

    def __init__(self, protocol: TrainingProtocol, stage: str | None = None, *, window: int = DEFAULT_WINDOW,
                 valve_ul_per_ms: float | None = None, linear_range_ms: tuple[float, float] | None = None,
                 log_range_ms: tuple[float, float] | None = None,
                 previous_intervals: dict[str, Iterable[float]] | None = None) -> None:
        self.protocol = protocol
        self.window = window
        self.valve_ul_per_ms = valve_ul_per_ms
        self._previous = previous_intervals or {}
        top = max(stage.window_high_ms for stage in protocol.stages)
        self._linear = linear_edges(*(linear_range_ms or (0.0, 2.0 * top)), LINEAR_BINS)
        self._log = log_edges(*(log_range_ms or (max(top / 100.0, 1.0), 10.0 * top)), LOG_BINS)
        self.trials = self.hits = self.lone = self.premature = self.omission = 0
        self.rewards = self.licks = 0
        self.water_ul = 0.0
        first = protocol.stage(stage) if stage else protocol.stages[0]
        first = first or protocol.stages[0]
        self._rules = (first.target_ms, first.window_low_ms, first.window_high_ms)
        self._stage = self._new_stage(stage or first.name)
        self._trace = _RateTrace()

    def _new_stage(self, name: str) -> _StageFigures:
        return _StageFigures(name, self.protocol.fixed_window(name), self.window, self._linear, self._log,
                             self._previous.get(name, ()))

    def add_trial(self, trial: Trial) -> None:
        outcome = trial.outcome
        if outcome == "lone":
            self.lone += 1
        elif outcome == "premature":
            self.premature += 1
        elif outcome == "omission":
            self.omission += 1
        else:
            self.trials += 1
            self.hits += trial.rewarded
        self._rules = (trial.target_ms, trial.window_low_ms, trial.window_high_ms)
        if trial.stage != self._stage.stage:
            self._stage = self._new_stage(trial.stage)
        if trial.completed:
            self._stage.add(trial)
            rolling = self._stage.rolling
            self._trace.append(self.trials, rolling.rate, *rolling.interval())

    def rate_series(self) -> RateSeries:
        """The rolling hit rate after each completed trial so far (the stage's, restarted at a stage change)."""
        return self._trace.view()

    def add_event(self, event: Any) -> None:
        """Licks, rewards and valve openings (other events are ignored here)."""
        name = getattr(event, "name", None)
        if name == "lick":
            self.licks += 1
        elif name == "reward" or name == "valve":
            self.rewards += name == "reward"
            self.water_ul += water_of(event, self.protocol, self.valve_ul_per_ms)

    def snapshot(self) -> LiveSnapshot:
        figures = self._stage
        low, high = figures.rolling.interval()
        intervals, hits = figures.recent_arrays()
        counted = figures.moments.count
        return LiveSnapshot(
            stage=figures.stage,
            target_ms=self._rules[0],
            window_low_ms=self._rules[1],
            window_high_ms=self._rules[2],
            trials=self.trials,
            hits=self.hits,
            hit_rate=self.hits / self.trials if self.trials else math.nan,
            lone=self.lone,
            premature=self.premature,
            omission=self.omission,
            rolling_trials=figures.rolling.count,
            rolling_hits=figures.rolling.hits,
            rolling_hit_rate=figures.rolling.rate,
            rolling_low=low,
            rolling_high=high,
            fixed_window_fraction=figures.in_fixed / counted if counted else math.nan,
            median_interval_ms=figures.median.median,
            rolling_median_ms=figures.rolling_median.median,
            cv=figures.moments.cv,
            median_abs_log_error=figures.log_error.median,
            rewards=self.rewards,
            licks=self.licks,
            water_ul=self.water_ul,
            linear=figures.linear.snapshot(),
            log=figures.log.snapshot(),
            recent_intervals_ms=intervals,
            recent_hits=hits,
        )


class LiveSession:
    """One session stream: events in, trials out, a snapshot on demand."""

    def __init__(self, protocol: TrainingProtocol, stage: str | None = None, **stats_options: Any) -> None:
        self.builder = TrialBuilder(protocol, stage)
        self.stats = LiveStats(protocol, stage, **stats_options)
        self.trials: list[Trial] = []

    def feed(self, event: Any) -> list[Trial]:
        """Take one event; return the trials it completed."""
        new = self.builder.feed(event)
        self.stats.add_event(event)
        for trial in new:
            self.stats.add_trial(trial)
        self.trials.extend(new)
        return new

    def finish(self) -> list[Trial]:
        """End of session: close open attempts."""
        new = self.builder.flush()
        for trial in new:
            self.stats.add_trial(trial)
        self.trials.extend(new)
        return new

    def snapshot(self) -> LiveSnapshot:
        """The figures now, with the target and window in force now (a `param` sent before the next trial
        moves them at once)."""
        target, low, high = self.builder.window_in_force
        return self.stats.snapshot()._replace(target_ms=target, window_low_ms=low, window_high_ms=high)
