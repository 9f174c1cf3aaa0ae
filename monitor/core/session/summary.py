"""Per-session summaries and the learning curve across sessions.

Rule: a session is summarised from its trial records (the rig's outcome where
it sent one): `trials` counts completed trials, `hits` rewarded ones; lone,
premature and omitted attempts and inter-trial presses are counted apart.
Interval figures use completed trials with an interval: median, CV = sample
SD / mean (ddof = 1), fraction within the fixed window (edges inside),
median |ln(interval / target)|. Figures are given for the whole session and
per stage. The learning curve takes one stage and one measure; it leaves out
(and lists, with the reason) sessions flagged excluded, sessions without
trials in that stage and sessions with fewer than `min_trials` of them, so
stages never mix silently. Sessions are indexed from 1 in the order given.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from typing import NamedTuple

import numpy as np

from monitor.core.protocol import BINARY_MEASURES, TrainingProtocol
from monitor.core.session.trials import Trial


class SessionInput(NamedTuple):
    """What a session contributes: its trial records and what the store knows of it."""

    trials: Sequence[Trial]
    start: str | None = None
    malformed_lines: int = 0
    excluded: bool = False
    exclusion_reason: str = ""
    counts: Mapping[str, int] = {}  # TrialBuilder.counts (inter_trial, disagreements, ...)
    water_ul: float | None = None
    protocol_version: int | None = None  # None: the protocol's


class Figures(NamedTuple):
    """The figures of a set of trials (a session, or its trials of one stage)."""

    trials: int
    hits: int
    hit_rate: float | None
    median_interval_ms: float | None
    cv: float | None
    fixed_window_fraction: float | None
    median_abs_log_error: float | None
    premature: int
    lone: int
    omission: int


class SessionSummary(NamedTuple):
    """One session, as the report and the learning curve see it."""

    index: int
    start: str | None
    figures: Figures
    by_stage: Mapping[str, Figures]
    stage: str | None  # the stage of the session's last attempt
    stages: tuple[str, ...]  # every stage seen, in order
    protocol_version: int
    malformed_lines: int
    inter_trial: int
    disagreements: int
    water_ul: float | None
    excluded: bool
    exclusion_reason: str


def _none(value: float) -> float | None:
    return None if value is None or not math.isfinite(value) else float(value)


def _arrays(trials: Sequence[Trial], fixed: tuple[float, float]) -> dict[str, np.ndarray]:
    """Per completed trial: rewarded; per trial with an interval: interval, in-window, |log error|."""
    done = [t for t in trials if t.completed]
    rewarded = np.fromiter((t.rewarded for t in done), bool, len(done))
    intervals = np.fromiter((t.interval_ms for t in done), float, len(done))
    targets = np.fromiter((t.target_ms for t in done), float, len(done))
    timed = np.isfinite(intervals)
    values, goals = intervals[timed], targets[timed]
    positive = (values > 0) & (goals > 0)
    with np.errstate(divide="ignore", invalid="ignore"):
        log_error = np.abs(np.log(values[positive] / goals[positive]))
    return {
        "rewarded": rewarded,
        "intervals": values,
        "in_window": (values >= fixed[0]) & (values <= fixed[1]),
        "log_error": log_error,
    }


def figures(trials: Sequence[Trial], fixed: tuple[float, float]) -> Figures:
    """Batch figures of `trials` with the fixed window `fixed` (ms)."""
    a = _arrays(trials, fixed)
    n, hits = len(a["rewarded"]), int(a["rewarded"].sum())
    values = a["intervals"]
    mean = values.mean() if len(values) else math.nan
    cv = values.std(ddof=1) / mean if len(values) > 1 and mean != 0 else math.nan
    outcomes = [t.outcome for t in trials]
    return Figures(
        trials=n,
        hits=hits,
        hit_rate=hits / n if n else None,
        median_interval_ms=_none(float(np.median(values))) if len(values) else None,
        cv=_none(cv),
        fixed_window_fraction=float(a["in_window"].mean()) if len(values) else None,
        median_abs_log_error=_none(float(np.median(a["log_error"]))) if len(a["log_error"]) else None,
        premature=outcomes.count("premature"),
        lone=outcomes.count("lone"),
        omission=outcomes.count("omission"),
    )


def summarize(protocol: TrainingProtocol, session: SessionInput, index: int) -> SessionSummary:
    """The summary of one session (`index` from 1)."""
    stages: list[str] = []
    by_stage: dict[str, list[Trial]] = {}
    for trial in session.trials:
        if trial.stage not in by_stage:
            stages.append(trial.stage)
            by_stage[trial.stage] = []
        by_stage[trial.stage].append(trial)
    last = session.trials[-1].stage if session.trials else None
    whole = protocol.fixed_window(last) if last else protocol.fixed_window(protocol.final_stage.name)
    counts = session.counts
    return SessionSummary(
        index=index,
        start=session.start,
        figures=figures(session.trials, whole),
        by_stage={name: figures(items, protocol.fixed_window(name)) for name, items in by_stage.items()},
        stage=last,
        stages=tuple(stages),
        protocol_version=protocol.version if session.protocol_version is None else session.protocol_version,
        malformed_lines=session.malformed_lines,
        inter_trial=int(counts.get("inter_trial", 0)),
        disagreements=int(counts.get("disagreements", 0)),
        water_ul=session.water_ul,
        excluded=session.excluded,
        exclusion_reason=session.exclusion_reason,
    )


class CurvePoint(NamedTuple):
    """One session on the learning curve of one stage."""

    session: int  # the session's index
    value: float
    trials: int
    outcomes: np.ndarray  # per trial, for binary measures (hit, or inside the fixed window); else empty


class LearningCurve(NamedTuple):
    stage: str
    measure: str
    points: tuple[CurvePoint, ...]
    left_out: tuple[tuple[int, str], ...]  # (session index, why)


def learning_curve(protocol: TrainingProtocol, sessions: Sequence[SessionInput], stage: str | None = None,
                   measure: str | None = None, min_trials: int | None = None) -> LearningCurve:
    """The curve of `measure` (default: the plateau's) in `stage` (default: the final stage)."""
    stage = stage or protocol.final_stage.name
    measure = measure or protocol.plateau.measure
    min_trials = protocol.plateau.min_trials if min_trials is None else min_trials
    fixed = protocol.fixed_window(stage)
    points: list[CurvePoint] = []
    left_out: list[tuple[int, str]] = []
    for index, session in enumerate(sessions, start=1):
        if session.excluded:
            why = f"excluded: {session.exclusion_reason}" if session.exclusion_reason else "excluded"
            left_out.append((index, why))
            continue
        trials = [t for t in session.trials if t.stage == stage]
        done = sum(t.completed for t in trials)
        if done == 0:
            left_out.append((index, f"no trials in stage {stage!r}"))
            continue
        if done < min_trials:
            left_out.append((index, f"{done} trials in stage {stage!r}, fewer than min_trials = {min_trials}"))
            continue
        value = getattr(figures(trials, fixed), measure)
        if value is None:
            left_out.append((index, f"no {measure} (no intervals)"))
            continue
        if measure in BINARY_MEASURES:
            a = _arrays(trials, fixed)
            outcomes = a["rewarded"] if measure == "hit_rate" else a["in_window"]
        else:
            outcomes = np.zeros(0, bool)
        points.append(CurvePoint(index, float(value), done, outcomes))
    return LearningCurve(stage, measure, tuple(points), tuple(left_out))
