"""Views: pure functions from engine snapshots, source status and stored history to the UI's view models.

Rule: nothing here touches Qt, a thread, the store or a file; every function
takes plain values and returns the frozen view models of `monitor.ui.models`.
Missing figures stay `None` (NaN in arrays), never 0. A rig's connection word
comes from its source's state and whether a session runs: lost (reader ended),
retrying (waiting for the device), quiet (session running, no event for
`quiet_after_s`), live (session running), idle (connected, no session). The session
clock is in whole seconds, so a tile changes once a second at most when no
trial arrives. Tile histograms are today's linear-bin counts of the stage in force; the rolling
hit rate's band is the 95 % Wilson interval. History is summarised per
session with the core's `summarize` and `learning_curve`; the plateau verdict
is the protocol's own rule (`judge`); the consolidation panel shows the
transparent measures first, then the fitted slow-state fraction when a fit is
given.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from typing import Any, NamedTuple

import numpy as np

from drivers.status import LOST, STOPPED, WAITING, SourceStatus
from monitor.app.engine import RigSnapshot
from monitor.core.binomial import wilson
from monitor.core.consolidation_words import fraction_text
from monitor.core.consolidation_model import TrialSeries
from monitor.core.plateau import judge
from monitor.core.protocol import Protocol
from monitor.core.sessions import BINARY_MEASURES, SessionInput, learning_curve, summarize
from monitor.core.trials import Trial
from monitor.ui.models import (AnimalPageState, ConsolidationState, Connection, CurveState, HistogramData,
                               RigTileState, SessionRow, Severity, StartDrop, StatusState, StoreHealth, TodayState)

QUIET_AFTER_S = 60.0
MEASURE_WORDS = {"hit_rate": "hit rate", "fixed_window_fraction": "fraction in window",
                 "median_abs_log_error": "median |log error|", "cv": "CV"}


def _finite(value: float | None) -> float | None:
    return float(value) if value is not None and math.isfinite(value) else None


# --- live -------------------------------------------------------------------------------
def connection(status: SourceStatus | None, in_session: bool, quiet_after_s: float = QUIET_AFTER_S) -> Connection:
    """The tile's connection word for a source state."""
    if status is None:
        return Connection.IDLE
    if status.state == LOST:
        return Connection.LOST
    if status.state == WAITING:
        return Connection.RETRYING
    if status.state == STOPPED or not in_session:
        return Connection.IDLE
    if status.silent_s is not None and status.silent_s >= quiet_after_s:
        return Connection.QUIET
    return Connection.LIVE


def tile_state(rig: str, snapshot: RigSnapshot | None, status: SourceStatus | None, *, now: float,
               source_text: str = "", alert_count: int = 0, alert_severity: Severity | None = None,
               quiet_after_s: float = QUIET_AFTER_S) -> RigTileState:
    """One overview tile; `now` is host monotonic seconds (the session clock)."""
    in_session = snapshot is not None and snapshot.session_id is not None and not snapshot.ended
    base = dict(rig=rig, connection=connection(status, in_session, quiet_after_s), source_text=source_text,
                alert_count=alert_count, alert_severity=alert_severity)
    if snapshot is None or snapshot.live is None or not in_session:
        return RigTileState(animal=None if not in_session else snapshot.animal, **base)
    live = snapshot.live
    recent = live.recent_intervals_ms
    last = _finite(float(recent[-1])) if len(recent) else None
    seconds = float(math.floor(now - snapshot.started)) if snapshot.started is not None else None
    return RigTileState(
        animal=snapshot.animal, session_seconds=seconds, trials_today=live.trials,
        hit_rate=_finite(live.rolling_hit_rate) if live.rolling_trials else None,
        hit_low=_finite(live.rolling_low) if live.rolling_trials else None,
        hit_high=_finite(live.rolling_high) if live.rolling_trials else None,
        last_interval_ms=last,
        hist_counts=tuple(live.linear.today.tolist()), hist_edges_ms=tuple(live.linear.edges.tolist()),
        window_low_ms=_finite(live.window_low_ms), window_high_ms=_finite(live.window_high_ms), **base)


def today_state(snapshot: RigSnapshot, previous_intervals: Mapping[str, Sequence[float]] | None = None,
                now: float | None = None) -> TodayState | None:
    """The live part of the animal page (None without a session).

    The previous session's histogram is the engine's when it had one, else the
    stage's intervals in `previous_intervals` (from the history loaded later).
    """
    live, series = snapshot.live, snapshot.series
    if live is None or series is None:
        return None
    earlier = (previous_intervals or {}).get(live.stage, ())

    def hist(h) -> HistogramData:
        previous = h.previous if h.previous is not None and np.sum(h.previous) > 0 else None
        if previous is None and len(earlier):
            previous = np.histogram(np.asarray(earlier, float), bins=h.edges)[0]
        return HistogramData(h.edges, h.today, previous)

    return TodayState(
        linear=hist(live.linear), log=hist(live.log),
        window_low_ms=_finite(live.window_low_ms), window_high_ms=_finite(live.window_high_ms),
        target_ms=_finite(live.target_ms), trial_index=series.trial, rolling_rate=series.rate,
        rolling_low=series.low, rolling_high=series.high, rolling_size=len(live.recent_hits) or 1,
        trials=live.trials, hits=live.hits, premature=live.premature, lone=live.lone, omission=live.omission,
        session_seconds=float(math.floor(now - snapshot.started))
        if now is not None and snapshot.started is not None else None)


def store_health(state: str) -> StoreHealth:
    """The status bar's word for the store writer's state."""
    return {"holding": StoreHealth.BEHIND, "overflow": StoreHealth.OVERFLOW,
            "failed": StoreHealth.FAILED}.get(state, StoreHealth.SAVING)


def status_state(statuses: Mapping[str, SourceStatus], writer_state: str, writer_text: str,
                 committed_events: int) -> StatusState:
    """The status bar: how many sources read, which are not, and the store writer."""
    words = [f"{rig}: {status.text}" for rig, status in statuses.items()
             if status.state in (LOST, WAITING, STOPPED)]
    reading = len(statuses) - len(words)
    sources = f"{reading} of {len(statuses)} sources reading" + (" — " + "; ".join(words) if words else "")
    health = store_health(writer_state)
    text = writer_text if health is not StoreHealth.SAVING else f"{committed_events} events saved"
    return StatusState(sources_text=sources if statuses else "no sources", store=health, store_text=text)


# --- history ------------------------------------------------------------------------------
class HistorySession(NamedTuple):
    """One past session of an animal, segmented, with what the store knows of it."""

    trials: tuple[Trial, ...]
    start: str = ""                 # local start time, formatted
    rig: str = ""
    counts: Mapping[str, int] = {}
    water_ul: float | None = None
    malformed_lines: int = 0
    excluded: bool = False
    exclusion_reason: str = ""
    conditions: str = ""
    break_hours: float = 23.0       # since the previous session ended
    session_id: int | None = None   # the store's id (exclusions and conditions refer to it)


class HistoryParts(NamedTuple):
    """The parts of an animal page that come from its history."""

    curve: CurveState
    consolidation: ConsolidationState
    sessions: tuple[SessionRow, ...]
    previous_intervals: dict[str, tuple[float, ...]]
    plateau_reached: bool
    plateau_session: int | None
    plateau_reason: str
    session_ids: tuple[int | None, ...] = ()   # the store's id of each row of `sessions`


def consolidation_series(protocol: Protocol, sessions: Sequence[HistorySession]) -> TrialSeries:
    """The final stage's completed trials as the consolidation estimator takes them (label = session index)."""
    from monitor.store.consolidation_fits import build_series

    return build_series(protocol.final_stage.name, [(s.trials, s.break_hours, s.excluded) for s in sessions])


def history_parts(protocol: Protocol, sessions: Sequence[HistorySession],
                  fit: Mapping[str, Any] | None = None) -> HistoryParts:
    """Learning curve, consolidation panel and session table from an animal's past sessions.

    `fit` is the consolidation block of the store's cached fit (CONTRACTS.md section 5 with its
    "trajectory", "forecast" and "current"), or None: measures only.
    """
    from monitor.core.consolidation_measures import since_plateau

    inputs = [SessionInput(s.trials, s.start, s.malformed_lines, s.excluded, s.exclusion_reason, s.counts,
                           s.water_ul) for s in sessions]
    summaries = [summarize(protocol, session, index) for index, session in enumerate(inputs, start=1)]
    curve = learning_curve(protocol, inputs)
    result = judge(protocol.plateau, curve)
    binary = curve.measure in BINARY_MEASURES
    bounds = [wilson(int(np.sum(p.outcomes)), len(p.outcomes)) if binary and len(p.outcomes) else (math.nan,) * 2
              for p in curve.points]
    plateau_session = result.session if result.reached else None
    curve_state = CurveState(
        session=np.array([p.session for p in curve.points], float),
        measure=np.array([p.value for p in curve.points], float),
        low=np.array([b[0] for b in bounds], float), high=np.array([b[1] for b in bounds], float),
        stage=tuple(summaries[p.session - 1].stage or "" for p in curve.points),
        measure_name=MEASURE_WORDS.get(curve.measure, curve.measure.replace("_", " ")),
        criterion=protocol.plateau.threshold, plateau_session=plateau_session,
        plateau_word="reached" if result.reached else "not reached", plateau_reason=result.reason)
    rows = tuple(SessionRow(
        index=s.index, start=sessions[s.index - 1].start, rig=sessions[s.index - 1].rig, stage=s.stage or "",
        trials=s.figures.trials, hits=s.figures.hits, hit_rate=s.figures.hit_rate,
        median_ms=s.figures.median_interval_ms, cv=s.figures.cv, excluded=s.excluded,
        exclusion_reason=s.exclusion_reason, conditions=sessions[s.index - 1].conditions) for s in summaries)
    series = consolidation_series(protocol, sessions)
    since = since_plateau(series, plateau_session)
    drops = hit_rate_drops(protocol, sessions)
    consolidation = _consolidation_state(since, _latest_error(protocol, sessions), drops, fit)
    previous: dict[str, tuple[float, ...]] = {}
    if sessions:
        for t in sessions[-1].trials:
            if t.completed and math.isfinite(t.interval_ms):
                previous.setdefault(t.stage, ())
                previous[t.stage] += (t.interval_ms,)
    return HistoryParts(curve_state, consolidation, rows, previous, result.reached, plateau_session, result.reason,
                        tuple(s.session_id for s in sessions))


def newcombe_difference(k1: int, n1: int, k2: int, n2: int, confidence: float = 0.95) -> tuple[float, float, float]:
    """p1 - p2 and its hybrid-score interval from the two Wilson intervals (Newcombe 1998, method 10)."""
    p1, p2 = k1 / n1, k2 / n2
    l1, u1 = wilson(k1, n1, confidence)
    l2, u2 = wilson(k2, n2, confidence)
    d = p1 - p2
    return d, d - math.sqrt((p1 - l1) ** 2 + (u2 - p2) ** 2), d + math.sqrt((u1 - p1) ** 2 + (p2 - l2) ** 2)


def hit_rate_drops(protocol: Protocol, sessions: Sequence[HistorySession], warmup: int = 5,
                   window: int = 20) -> tuple[StartDrop, ...]:
    """Per session: hit rate of the previous session's last `window` final-stage trials minus that of this
    session's `window` trials after the first `warmup` (warm-up set apart); with a 95 % interval."""
    final = protocol.final_stage.name
    kept = [(index, [t.rewarded for t in s.trials if t.completed and t.stage == final])
            for index, s in enumerate(sessions, start=1) if not s.excluded]
    kept = [(index, hits) for index, hits in kept if hits]
    drops = []
    for (_, before), (index, now) in zip(kept[:-1], kept[1:]):
        end, start = before[-window:], now[warmup:warmup + window]
        if end and start:
            d, low, high = newcombe_difference(sum(end), len(end), sum(start), len(start))
            drops.append(StartDrop(index, d, low, high, warmup))
    return tuple(drops)


def _latest_error(protocol: Protocol, sessions: Sequence[HistorySession]) -> tuple[float | None, float | None]:
    """Median |interval - target| (ms) and CV of the final stage in the latest session that has trials."""
    final = protocol.final_stage.name
    for session in reversed(sessions):
        if session.excluded:
            continue
        done = [t for t in session.trials if t.completed and t.stage == final and math.isfinite(t.interval_ms)]
        if len(done) >= 2:
            intervals = np.array([t.interval_ms for t in done])
            targets = np.array([t.target_ms for t in done])
            cv = float(np.std(intervals, ddof=1) / np.mean(intervals))
            return float(np.median(np.abs(intervals - targets))), cv
    return None, None


def _consolidation_state(since: Mapping[str, int | None], latest: tuple[float | None, float | None],
                         drops: tuple[StartDrop, ...], fit: Mapping[str, Any] | None) -> ConsolidationState:
    error_ms, cv = latest
    empty = np.zeros(0)
    rows = list(fit.get("trajectory") or ()) if fit is not None else []
    if not rows:
        why = "not fitted yet" if fit is None else f"{fit['status']}" + (f", {fit['reason']}" if fit.get("reason") else "")
        return ConsolidationState(since["trials"], since["sessions"], error_ms, cv, drops, empty, empty, empty,
                                  empty, (), model_comparison=f"Model: {why}.")
    comparison = f"Model ({fit['status']}): {fit.get('reason', '')}."
    if fit.get("current") is False:
        comparison += " Fitted before the latest data; a refit is due."
    low = high = None
    forecast = fit.get("forecast") or {}
    level = forecast.get("level", 0.8)
    words = ""
    if forecast and fit["status"] == "estimated":
        low, high = forecast["sessions_low"], forecast["sessions_high"]
        words = f"already above {level:.2f}" if forecast.get("reached") else forecast.get("summary", "")
    last = rows[-1]
    return ConsolidationState(
        since["trials"], since["sessions"], error_ms, cv, drops,
        session=np.array([r["session"] for r in rows], float), fraction=np.array([r["estimate"] for r in rows], float),
        fraction_low=np.array([r["low"] for r in rows], float), fraction_high=np.array([r["high"] for r in rows], float),
        status=tuple(r["status"] for r in rows), model_comparison=comparison, forecast_low=low, forecast_high=high,
        forecast_level=level, forecast_text=words,
        estimate_text=fraction_text(last["estimate"], last["low"], last["high"], last["status"]))


def page_state(animal: str, rig: str | None, protocol_name: str, today: TodayState | None,
               history: HistoryParts | None, care_text: str = "", eligibility_text: str = "",
               consolidation: ConsolidationState | None = None) -> AnimalPageState:
    """An animal page from its live part and its history parts (the same part objects until they change);
    `consolidation` replaces the history's panel (the same panel with this session's figure)."""
    return AnimalPageState(animal=animal, rig=rig, protocol=protocol_name, today=today,
                           curve=history.curve if history else None,
                           consolidation=consolidation or (history.consolidation if history else None),
                           sessions=history.sessions if history else (), care_text=care_text,
                           eligibility_text=eligibility_text)
