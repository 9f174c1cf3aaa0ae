"""A manipulation's effect on one animal: the baseline rule, five measures and their bootstrap intervals.

Rule: a manipulation is judged on the trials of one stage (the stage of the
first affected session). Its baseline is, by default, the last 3 sessions of
that stage before the first affected one that are neither excluded nor
themselves affected by a manipulation (`baseline_sessions`). Per session
five measures are computed from its attempts: `hit_rate` (rewarded / completed
trials), `interval_error` (median |ln(interval / target)| of completed trials),
`cv` (SD / mean of their intervals, ddof 1), `premature_rate` (premature /
(completed + premature) attempts) and `trials_per_minute` (completed trials /
session minutes). A group of sessions is summarised by the mean of its
sessions' values, each session weighing the same. An effect is
mean(affected) - mean(baseline); its 95 % interval is a percentile bootstrap
that resamples attempts with replacement within each session (a stratified
bootstrap: every session keeps its size), except trials per minute, whose
count is redrawn from a Poisson law with the observed count as its mean (the
session's length is fixed). The interval covers trial-to-trial sampling
noise only, given those sessions; day-to-day variation is what the baseline's
own session-to-session spread (`baseline_spread`) and an acute manipulation's
control session show. Recovery after a lasting manipulation is the first
later session whose interval against the baseline holds 0 ("not recovered"
when none does). Pure: numpy only; the caller gives trials and minutes.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import NamedTuple

import numpy as np

from monitor.core.session.trials import Trial

MEASURES = ("hit_rate", "interval_error", "cv", "premature_rate", "trials_per_minute")
BASELINE_SESSIONS = 3
LEVEL = 0.95
RESAMPLES = 2000
MAX_UNDEFINED = 0.05  # resamples whose measure is undefined (no completed trial, ...): above this, no interval


class SessionTrials(NamedTuple):
    """One session's attempts in the stage judged, with its length in minutes (None: not known)."""

    index: int  # the session's index in the animal's report, from 1
    trials: Sequence[Trial]
    minutes: float | None = None


class Candidate(NamedTuple):
    """A session the baseline rule may pick: its index, its stages, and whether it may serve."""

    index: int
    stages: tuple[str, ...]
    usable: bool  # False: excluded, or affected by a manipulation


def baseline_sessions(candidates: Sequence[Candidate], first_affected: int, stage: str,
                      count: int = BASELINE_SESSIONS) -> tuple[int, ...]:
    """The last `count` usable sessions with trials of `stage` before `first_affected`, in time order."""
    if count < 1:
        raise ValueError("the baseline needs at least one session")
    picked = [c.index for c in candidates if c.index < first_affected and c.usable and stage in c.stages]
    return tuple(sorted(picked)[-count:])


@dataclass(frozen=True)
class _Arrays:
    """Per attempt: completed, rewarded, premature; interval and |log error| (nan where none)."""

    completed: np.ndarray
    rewarded: np.ndarray
    premature: np.ndarray
    interval: np.ndarray
    log_error: np.ndarray
    minutes: float | None

    @classmethod
    def of(cls, session: SessionTrials) -> "_Arrays":
        trials = list(session.trials)
        completed = np.array([t.completed for t in trials], bool)
        interval = np.array([t.interval_ms if t.completed else math.nan for t in trials], float)
        target = np.array([t.target_ms for t in trials], float)
        ok = np.isfinite(interval) & (interval > 0) & (target > 0)
        log_error = np.full(len(trials), math.nan)
        log_error[ok] = np.abs(np.log(interval[ok] / target[ok]))
        interval[~np.isfinite(interval)] = math.nan
        return cls(completed, np.array([t.completed and t.rewarded for t in trials], bool),
                   np.array([t.outcome == "premature" for t in trials], bool), interval, log_error,
                   session.minutes if session.minutes and session.minutes > 0 else None)


def _measures(a: _Arrays, idx: np.ndarray | None, counts: np.ndarray | None) -> dict[str, np.ndarray]:
    """Measures of the attempts `a[idx]` row by row (idx None: the attempts as recorded, one row)."""
    if len(a.completed) == 0:
        return {m: np.full(1 if idx is None else len(idx), np.nan) for m in MEASURES}
    pick = (lambda x: x[None, :]) if idx is None else (lambda x: x[idx])
    completed, rewarded, premature = pick(a.completed), pick(a.rewarded), pick(a.premature)
    interval, log_error = pick(a.interval), pick(a.log_error)
    n_done = completed.sum(axis=1).astype(float)
    n_judged = n_done + premature.sum(axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        hit_rate = np.where(n_done > 0, rewarded.sum(axis=1) / n_done, np.nan)
        premature_rate = np.where(n_judged > 0, premature.sum(axis=1) / n_judged, np.nan)
        timed = np.isfinite(interval).sum(axis=1)
        mean = np.nanmean(np.where(timed[:, None] > 0, interval, 0.0), axis=1)
        sd = np.nanstd(np.where(timed[:, None] > 1, interval, 0.0), axis=1, ddof=1)
        cv = np.where((timed > 1) & (mean != 0), sd / mean, np.nan)
        error = _row_medians(log_error)
    done = n_done if counts is None else counts.astype(float)
    per_minute = done / a.minutes if a.minutes else np.full(len(n_done), np.nan)
    return {"hit_rate": hit_rate, "interval_error": error, "cv": cv, "premature_rate": premature_rate,
            "trials_per_minute": per_minute}


def _row_medians(values: np.ndarray) -> np.ndarray:
    """Median of each row's finite values (nan for a row without any); one sort, no Python loop."""
    ordered = np.sort(np.where(np.isfinite(values), values, np.inf), axis=1)
    k = np.isfinite(values).sum(axis=1)
    low = np.take_along_axis(ordered, np.maximum((k - 1) // 2, 0)[:, None], axis=1)[:, 0]
    high = np.take_along_axis(ordered, np.minimum(k // 2, max(values.shape[1] - 1, 0))[:, None], axis=1)[:, 0]
    return np.where(k > 0, (low + high) / 2, np.nan)


def session_measures(session: SessionTrials) -> dict[str, float | None]:
    """The five measures of one session (None where undefined)."""
    values = _measures(_Arrays.of(session), None, None)
    return {m: _finite(values[m][0]) for m in MEASURES}


def _resampled(a: _Arrays, rng: np.random.Generator, resamples: int) -> dict[str, np.ndarray]:
    idx = rng.integers(0, len(a.completed), size=(resamples, len(a.completed)))
    counts = rng.poisson(int(a.completed.sum()), size=resamples)
    return _measures(a, idx, counts)


def _finite(value: float) -> float | None:
    return float(value) if value is not None and math.isfinite(value) else None


@dataclass(frozen=True)
class Estimate:
    """One measure's effect: affected - baseline, with its interval (None: not computable)."""

    measure: str
    effect: float | None
    low: float | None
    high: float | None
    affected: float | None  # mean of the affected sessions' values
    baseline: float | None  # mean of the baseline sessions' values

    @property
    def excludes_zero(self) -> bool | None:
        """True when the interval lies wholly above or below 0 (None: no interval)."""
        if self.low is None or self.high is None:
            return None
        return self.low > 0 or self.high < 0

    def to_dict(self) -> dict[str, float | None]:
        return {"effect": self.effect, "low": self.low, "high": self.high, "affected": self.affected,
                "baseline": self.baseline}


def _mean_of(values: Sequence[float | None]) -> float | None:
    known = [v for v in values if v is not None]
    return sum(known) / len(known) if len(known) == len(values) and known else None


def compare(affected: Sequence[SessionTrials], baseline: Sequence[SessionTrials], *, level: float = LEVEL,
            resamples: int = RESAMPLES, seed: int = 0) -> dict[str, Estimate]:
    """Each measure's mean(affected) - mean(baseline) with its stratified percentile bootstrap interval.

    `seed` fixes the resampling, so the same data give the same interval every time.
    """
    if not affected or not baseline:
        raise ValueError("an effect needs at least one affected and one baseline session")
    if not 0 < level < 1:
        raise ValueError("level must lie between 0 and 1")
    rng = np.random.default_rng(seed)
    arrays = [_Arrays.of(s) for s in (*affected, *baseline)]
    points = [_measures(a, None, None) for a in arrays]
    draws = [_resampled(a, rng, resamples) for a in arrays]
    k = len(affected)
    out: dict[str, Estimate] = {}
    tail = (1 - level) / 2
    for m in MEASURES:
        values = [_finite(p[m][0]) for p in points]
        a_mean, b_mean = _mean_of(values[:k]), _mean_of(values[k:])
        effect = None if a_mean is None or b_mean is None else a_mean - b_mean
        low = high = None
        if effect is not None:
            diff = np.mean([d[m] for d in draws[:k]], axis=0) - np.mean([d[m] for d in draws[k:]], axis=0)
            ok = diff[np.isfinite(diff)]
            if len(ok) >= (1 - MAX_UNDEFINED) * resamples:
                low, high = (float(v) for v in np.quantile(ok, [tail, 1 - tail]))
        out[m] = Estimate(m, effect, low, high, a_mean, b_mean)
    return out


def baseline_spread(baseline: Sequence[SessionTrials]) -> dict[str, tuple[float, float] | None]:
    """Each measure's (lowest, highest) value among the baseline sessions (day-to-day variation)."""
    values = [session_measures(s) for s in baseline]
    out: dict[str, tuple[float, float] | None] = {}
    for m in MEASURES:
        known = [v[m] for v in values if v[m] is not None]
        out[m] = (min(known), max(known)) if known else None
    return out


@dataclass(frozen=True)
class Recovery:
    """After a lasting manipulation: the first later session back within the baseline's interval."""

    measure: str
    sessions: int | None  # 1 = the first affected session itself; None = not recovered
    session_index: int | None
    followed: int  # sessions looked at

    @property
    def recovered(self) -> bool:
        return self.sessions is not None

    def to_dict(self) -> dict[str, object]:
        return {"measure": self.measure, "recovered": self.recovered, "sessions": self.sessions,
                "session": self.session_index, "followed": self.followed}


def recovery(after: Sequence[SessionTrials], baseline: Sequence[SessionTrials], measure: str = "hit_rate", *,
             level: float = LEVEL, resamples: int = RESAMPLES, seed: int = 0) -> Recovery:
    """Sessions until one's interval against the baseline holds 0 (in `measure`), counted from 1."""
    if measure not in MEASURES:
        raise ValueError(f"measure must be one of {', '.join(MEASURES)}")
    for position, session in enumerate(after, start=1):
        e = compare([session], baseline, level=level, resamples=resamples, seed=seed + position)[measure]
        if e.excludes_zero is False:
            return Recovery(measure, position, session.index, position)
    return Recovery(measure, None, None, len(after))


@dataclass(frozen=True)
class AnimalEffect:
    """A manipulation's effect on one animal: against its baseline, and (acute) against its control session."""

    baseline_indices: tuple[int, ...]
    affected_indices: tuple[int, ...]
    vs_baseline: Mapping[str, Estimate]
    spread: Mapping[str, tuple[float, float] | None]
    vs_control: Mapping[str, Estimate] | None = None
    control_index: int | None = None
    recovery: Recovery | None = None
    notes: tuple[str, ...] = field(default=())

    def to_dict(self) -> dict[str, object]:
        return {
            "baseline_sessions": list(self.baseline_indices),
            "affected_sessions": list(self.affected_indices),
            "vs_baseline": {m: e.to_dict() for m, e in self.vs_baseline.items()},
            "baseline_range": {m: None if r is None else list(r) for m, r in self.spread.items()},
            "control_session": self.control_index,
            "vs_control": None if self.vs_control is None else {m: e.to_dict() for m, e in self.vs_control.items()},
            "recovery": None if self.recovery is None else self.recovery.to_dict(),
            "notes": list(self.notes),
        }


def animal_effect(affected: SessionTrials, baseline: Sequence[SessionTrials], *,
                  control: SessionTrials | None = None, later: Sequence[SessionTrials] | None = None,
                  recovery_measure: str = "hit_rate", seed: int = 0, resamples: int = RESAMPLES) -> AnimalEffect:
    """The effect of one manipulation whose first affected session is `affected`.

    `control` (acute: the vehicle or sham session) adds affected - control;
    `later` (lasting: the sessions after the first affected one, in order)
    adds the recovery, counted over the first affected session and them.
    """
    notes = []
    if len(baseline) < BASELINE_SESSIONS:
        notes.append(f"baseline of {len(baseline)} session(s), fewer than {BASELINE_SESSIONS}")
    vs_baseline = compare([affected], baseline, seed=seed, resamples=resamples)
    vs_control = None if control is None else compare([affected], [control], seed=seed + 7919, resamples=resamples)
    rec = None
    if later is not None:
        rec = recovery([affected, *later], baseline, recovery_measure, seed=seed + 104729, resamples=resamples)
    return AnimalEffect(tuple(s.index for s in baseline), (affected.index,), vs_baseline, baseline_spread(baseline),
                        vs_control, None if control is None else control.index, rec, tuple(notes))
