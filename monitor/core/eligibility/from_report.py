"""An animal's figures read from its per-animal report and consolidation fit.

Rule: `figures_from_report` takes the plain per-animal report (the shape of
`monitor.core.session.animal_report`: sessions in time order, `plateau`) as of
its latest session and, optionally, the cached consolidation figure
`{"session", "estimate", "low", "high", "status"}`. Excluded sessions are left
out of every count and measure. The transparent measures are the latest
included session's (`median_abs_log_error` is the `interval_error`;
`start_drop` is that session's drop against the session before);
`sessions_since_plateau` counts included sessions after the plateau session
and `trials_since_plateau` their completed trials; `trials_per_session` is the
fewest and most trials of the last `recent` included sessions. A consolidation
figure from an older session than the latest keeps its numbers but gets the
status "stale (session N)", which no rule accepts unless it names it. Pure;
plain dicts in.
"""

from __future__ import annotations

from typing import Any, Mapping

from monitor.core.eligibility.figures import AnimalFigures, SessionForecast

MEASURE_KEYS = {"hit_rate": "hit_rate", "fixed_window_fraction": "fixed_window_fraction",
                "interval_error": "median_abs_log_error", "cv": "cv", "start_drop": "start_drop"}


def figures_from_report(report: Mapping[str, Any], consolidation: Mapping[str, Any] | None = None, *,
                        forecast: Mapping[str, SessionForecast] | None = None,
                        recent: int = 5) -> AnimalFigures:
    """AnimalFigures as of the report's latest included session."""
    sessions = [s for s in report.get("sessions", []) if not s.get("excluded")]
    latest = sessions[-1] if sessions else {}
    plateau = report.get("plateau") or {}
    reached = bool(plateau.get("reached")) and plateau.get("session") is not None
    plateau_session = plateau.get("session") if reached else None
    after = [s for s in sessions if reached and s["index"] > plateau_session]
    measures: dict[str, float | None] = {name: latest.get(key) for name, key in MEASURE_KEYS.items()}
    counts = [s.get("trials") for s in sessions[-recent:] if isinstance(s.get("trials"), int) and s["trials"] > 0]
    slow: dict[str, Any] = {}
    if consolidation:
        status = consolidation.get("status")
        fitted = consolidation.get("session")
        if fitted != latest.get("index"):
            status = f"stale (session {fitted})"
        slow = dict(slow_estimate=consolidation.get("estimate"), slow_low=consolidation.get("low"),
                    slow_high=consolidation.get("high"), slow_status=status)
    return AnimalFigures(
        animal=report["animal"],
        protocol_name=report.get("protocol", ""),
        protocol_version=latest.get("protocol_version") or report.get("protocol_version", 0),
        session=latest.get("index"),
        plateau_reached=reached,
        plateau_session=plateau_session,
        sessions_since_plateau=len(after) if reached else None,
        trials_since_plateau=sum(s.get("trials") or 0 for s in after) if reached else None,
        measures=measures,
        trials_per_session=(min(counts), max(counts)) if counts else None,
        forecast=dict(forecast or {}),
        **slow,
    )
