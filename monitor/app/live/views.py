"""Views: pure functions from engine snapshots, source status and stored history to the UI's view models.

Rule: nothing here touches Qt, a thread, the store or a file (history comes as
monitor.store.history's plain `HistorySession` records); every function
takes plain values and returns the frozen view models of `monitor.ui.models`.
Missing figures stay `None` (NaN in arrays), never 0. A rig's connection word
comes from its source's state and whether a session runs: lost (reader ended),
retrying (waiting for the device), quiet (session running, no event for
`quiet_after_s`), live (session running), idle (connected, no session), unattended
(no session, but presses arrive). The session
clock is in whole seconds, so a tile changes once a second at most when no
trial arrives. Tile histograms are today's linear-bin counts of the stage in force; the rolling
hit rate's band is the 95 % Wilson interval. History is summarised per
session with the core's `summarize` and `learning_curve`: the curve shows
every session of every stage, the plateau verdict is the protocol's own rule
(`judge`) on the final stage; the consolidation panel shows the transparent
measures first — the eligibility's own figures (`figures_from_report`) — then
the fitted slow-state fraction when a fit is given.
"""

from __future__ import annotations

import math
from dataclasses import replace
from collections.abc import Mapping, Sequence
from typing import Any, NamedTuple

import numpy as np

from drivers.status import LOST, STOPPED, WAITING, SourceStatus
from monitor.app.live.engine import RigSnapshot
from monitor.core.eligibility.figures import AnimalFigures
from monitor.core.eligibility.from_report import figures_from_report
from monitor.core.session.binomial import wilson
from monitor.core.session.plateau import judge
from monitor.core.session.start_drop import hit_rate_drops
from monitor.core.consolidation.words import fraction_text
from monitor.core.protocol import TrainingProtocol
from monitor.core.session.summary import BINARY_MEASURES, SessionInput, learning_curve, summarize
from monitor.store.history import HistorySession
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
    word = connection(status, in_session, quiet_after_s)
    unattended = snapshot.unattended_events if snapshot is not None and not in_session else 0
    if unattended and word is Connection.IDLE and status is not None and status.state != STOPPED:
        word = Connection.UNATTENDED
    base = dict(rig=rig, connection=word, source_text=source_text, alert_count=alert_count,
                alert_severity=alert_severity, unattended_presses=unattended)
    if snapshot is None or snapshot.live is None or not in_session:
        return RigTileState(animal=None if not in_session else snapshot.animal, **base)
    live = snapshot.live
    recent = live.recent_intervals_ms
    last = _finite(float(recent[-1])) if len(recent) else None
    seconds = float(math.floor(now - snapshot.started)) if snapshot.started is not None else None
    return RigTileState(
        animal=snapshot.animal, session_seconds=seconds, trials_today=live.trials,
        hit_rate=_finite(live.rolling_hit_rate) if live.rolling_trials else None, hit_window=live.rolling_trials,
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
    troubled = {rig: status for rig, status in statuses.items() if status.state in (LOST, WAITING, STOPPED)}
    words = {LOST: "lost", WAITING: "retrying", STOPPED: "stopped"}
    counts = [(word, sum(s.state == state for s in troubled.values())) for state, word in words.items()]
    reading = len(statuses) - len(troubled)
    sources = f"{reading} of {len(statuses)} sources reading" + \
        ("; " + ", ".join(f"{n} {word}" for word, n in counts if n) if troubled else "")
    detail = "\n".join(f"{rig}: {status.text}" for rig, status in troubled.items())
    health = store_health(writer_state)
    text = writer_text if health is not StoreHealth.SAVING else f"{committed_events} events saved"
    return StatusState(sources_text=sources if statuses else "no sources", store=health, store_text=text,
                       sources_detail=detail, sources_trouble=bool(troubled))


# --- history ------------------------------------------------------------------------------
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


def history_parts(protocol: TrainingProtocol, sessions: Sequence[HistorySession],
                  fit: Mapping[str, Any] | None = None) -> HistoryParts:
    """Learning curve, consolidation panel and session table from an animal's past sessions.

    `fit` is the consolidation block of the store's cached fit (the report's block with its
    "trajectory", "forecast" and "current"), or None: measures only.
    """
    inputs = [SessionInput(s.trials, s.start, s.malformed_lines, s.excluded, s.exclusion_reason, s.counts,
                           s.water_ul) for s in sessions]
    summaries = [summarize(protocol, session, index) for index, session in enumerate(inputs, start=1)]
    curve = learning_curve(protocol, inputs)          # the final stage's, as the plateau rule judges it
    result = judge(protocol.plateau, curve)
    plateau_session = result.session if result.reached else None
    curve_state = _curve_state(protocol, inputs, curve.measure, result, plateau_session)
    rows = tuple(SessionRow(
        index=s.index, start=sessions[s.index - 1].start, rig=sessions[s.index - 1].rig, stage=s.stage or "",
        trials=s.figures.trials, hits=s.figures.hits, hit_rate=s.figures.hit_rate,
        median_ms=s.figures.median_interval_ms, cv=s.figures.cv, excluded=s.excluded,
        exclusion_reason=s.exclusion_reason, conditions=sessions[s.index - 1].conditions) for s in summaries)
    figures = figures_from_report({"animal": "", "sessions": [dict(
        index=s.index, trials=s.figures.trials, excluded=s.excluded, hit_rate=s.figures.hit_rate, cv=s.figures.cv,
        fixed_window_fraction=s.figures.fixed_window_fraction, median_abs_log_error=s.figures.median_abs_log_error)
        for s in summaries], "plateau": {"reached": result.reached, "session": plateau_session}})
    drops = hit_rate_drops(protocol.final_stage.name,
                           [(index, s.trials) for index, s in enumerate(sessions, start=1) if not s.excluded])
    consolidation = _consolidation_state(figures, drops, fit)
    previous = stage_intervals(sessions[-1]) if sessions else {}
    return HistoryParts(curve_state, consolidation, rows, previous, result.reached, plateau_session, result.reason,
                        tuple(s.session_id for s in sessions))


def stage_intervals(session: HistorySession) -> dict[str, tuple[float, ...]]:
    """A session's completed intervals by stage (the previous session's histogram on the page)."""
    out: dict[str, tuple[float, ...]] = {}
    for t in session.trials:
        if t.completed and math.isfinite(t.interval_ms):
            out.setdefault(t.stage, ())
            out[t.stage] += (t.interval_ms,)
    return out


def stage_names(protocol: TrainingProtocol, sessions: Sequence[SessionInput]) -> tuple[str, ...]:
    """Every stage with trials, the protocol's order first, then any other stage in the order it was met."""
    seen = {t.stage for s in sessions for t in s.trials}
    known = [s.name for s in protocol.stages if s.name in seen]
    others = list(dict.fromkeys(t.stage for s in sessions for t in s.trials if t.stage not in known))
    return tuple(known + others)


def _curve_state(protocol: TrainingProtocol, inputs: Sequence[SessionInput], measure: str, result: Any,
                 plateau_session: int | None) -> CurveState:
    """Every kept session of every stage (one point per session and stage, even short ones), by stage."""
    binary = measure in BINARY_MEASURES
    points: list[tuple[int, str, float, float, float, int]] = []
    for name in stage_names(protocol, inputs):
        for p in learning_curve(protocol, inputs, stage=name, measure=measure, min_trials=1).points:
            low, high = (wilson(int(np.sum(p.outcomes)), len(p.outcomes)) if binary and len(p.outcomes)
                         else (math.nan, math.nan))
            points.append((p.session, name, p.value, low, high, p.trials))
    return CurveState(
        session=np.array([p[0] for p in points], float), measure=np.array([p[2] for p in points], float),
        low=np.array([p[3] for p in points], float), high=np.array([p[4] for p in points], float),
        stage=tuple(p[1] for p in points), trials=tuple(p[5] for p in points),
        measure_name=MEASURE_WORDS.get(measure, measure.replace("_", " ")),
        criterion=protocol.plateau.threshold, plateau_session=plateau_session,
        plateau_word="reached" if result.reached else "not reached", plateau_reason=result.reason,
        final_stage=protocol.final_stage.name)


def _consolidation_state(figures: AnimalFigures, drops: tuple[StartDrop, ...],
                         fit: Mapping[str, Any] | None) -> ConsolidationState:
    """The transparent measures are the eligibility's own figures (one definition each), then the model."""
    since = {"trials": figures.trials_since_plateau, "sessions": figures.sessions_since_plateau}
    error, cv = figures.measures.get("interval_error"), figures.measures.get("cv")
    empty = np.zeros(0)
    rows = list(fit.get("trajectory") or ()) if fit is not None else []
    if not rows:
        why = "not fitted yet" if fit is None else f"{fit['status']}" + (f", {fit['reason']}" if fit.get("reason") else "")
        return ConsolidationState(since["trials"], since["sessions"], error, cv, drops, empty, empty, empty,
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
        since["trials"], since["sessions"], error, cv, drops,
        session=np.array([r["session"] for r in rows], float), fraction=np.array([r["estimate"] for r in rows], float),
        fraction_low=np.array([r["low"] for r in rows], float), fraction_high=np.array([r["high"] for r in rows], float),
        status=tuple(r["status"] for r in rows), model_comparison=comparison, forecast_low=low, forecast_high=high,
        forecast_level=level, forecast_text=words,
        estimate_text=fraction_text(last["estimate"], last["low"], last["high"], last["status"]))


def with_figures(panel: ConsolidationState, figures: AnimalFigures) -> ConsolidationState:
    """The panel with the eligibility's own figures as its measures (the same session, the same definition as
    the eligibility line), once the animal is judged."""
    return replace(panel, trials_since_plateau=figures.trials_since_plateau,
                   sessions_since_plateau=figures.sessions_since_plateau,
                   interval_error=figures.measures.get("interval_error"), cv=figures.measures.get("cv"),
                   measures_session=figures.session)


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
