"""Transparent measures shown before the model figure: plain summaries of the trials.

Rule: pure functions of a TrialSeries (excluded sessions and non-finite trials
left out); per session in time order.  Interval error is the median |log(interval
/ target)|; CV is SD / mean of the intervals (of interval/target when only y is
known); a trend is the least-squares slope per session over the last sessions
with its 90 % interval; outcome sensitivity is how much the next interval
moves after an unrewarded versus a rewarded trial, within sessions. The
start-of-session drop has one home, monitor.core.session.start_drop.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from monitor.core.consolidation.model import TrialSeries


@dataclass(frozen=True)
class SessionSummary:
    session: int
    trials: int
    median_abs_error: float
    cv: float
    hit_rate: float


def _included(series: TrialSeries) -> list[tuple[int, np.ndarray, np.ndarray, np.ndarray]]:
    """(label, y, rewarded, ratio) per included session with at least one finite trial."""
    labels = series.labels
    session = np.asarray(series.session)
    y = np.asarray(series.y, float)
    rew = np.asarray(series.rewarded, bool)
    excluded = np.asarray(series.excluded, bool)
    out = []
    for k, label in enumerate(labels):
        if excluded[k]:
            continue
        sel = (session == label) & np.isfinite(y)
        if sel.any():
            out.append((int(label), y[sel], rew[sel], np.exp(y[sel])))
    return out


def session_summaries(series: TrialSeries) -> list[SessionSummary]:
    """Trials, median absolute log error, CV and hit rate per included session."""
    rows = []
    for label, y, rew, ratio in _included(series):
        cv = float(np.std(ratio, ddof=1) / np.mean(ratio)) if len(ratio) > 1 else float("nan")
        rows.append(SessionSummary(label, len(y), float(np.median(np.abs(y))), cv, float(np.mean(rew))))
    return rows


@dataclass(frozen=True)
class Trend:
    slope: float  # per session
    low: float  # 90 % interval of the slope
    high: float
    sessions: int


def trend(values: list[float] | np.ndarray, last: int = 10) -> Trend:
    """Least-squares slope per session over the last ``last`` finite values, with a 90 % t interval."""
    from scipy.stats import t as student_t

    v = np.asarray(values, float)[-last:]
    x = np.arange(len(v), dtype=float)[np.isfinite(v)]
    v = v[np.isfinite(v)]
    if len(v) < 3:
        return Trend(float("nan"), float("nan"), float("nan"), len(v))
    xc = x - x.mean()
    slope = float(xc @ (v - v.mean()) / (xc @ xc))
    resid = v - v.mean() - slope * xc
    se = float(np.sqrt(resid @ resid / (len(v) - 2) / (xc @ xc)))
    half = float(student_t.ppf(0.95, len(v) - 2)) * se
    return Trend(slope, slope - half, slope + half, len(v))


@dataclass(frozen=True)
class OutcomeSensitivity:
    after_miss: float  # mean |y[n+1] - y[n]| after an unrewarded trial
    after_hit: float  # same after a rewarded trial
    difference: float  # after_miss - after_hit (> 0: the animal changes more after a miss)
    correction_slope: float  # slope of y[n+1] - y[n] on y[n] (< 0: errors are corrected)
    pairs: int


def outcome_sensitivity(series: TrialSeries, last_sessions: int | None = None) -> OutcomeSensitivity:
    """How the next interval depends on the last outcome, over consecutive trials within sessions."""
    sessions = _included(series)
    if last_sessions is not None:
        sessions = sessions[-last_sessions:]
    steps, levels, outcomes = [], [], []
    for _, y, rew, _ in sessions:
        steps.append(np.diff(y))
        levels.append(y[:-1])
        outcomes.append(rew[:-1])
    d = np.concatenate(steps) if steps else np.zeros(0)
    lv = np.concatenate(levels) if levels else np.zeros(0)
    hit = np.concatenate(outcomes) if outcomes else np.zeros(0, bool)
    miss_mean = float(np.mean(np.abs(d[~hit]))) if np.any(~hit) else float("nan")
    hit_mean = float(np.mean(np.abs(d[hit]))) if np.any(hit) else float("nan")
    lc = lv - lv.mean() if len(lv) else lv
    slope = float(lc @ d / (lc @ lc)) if len(lv) > 1 and lc @ lc > 0 else float("nan")
    return OutcomeSensitivity(miss_mean, hit_mean, miss_mean - hit_mean, slope, len(d))
