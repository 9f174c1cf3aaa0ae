"""The per-animal report (`rigside report`), built from a protocol and sessions.

Rule: pure. `animal_report` takes the protocol and, per session in time
order, either its events (segmented here by `derivation.derive_session`, so the
report and the live view count alike) or its trial records, plus what the
store knows (start time text, malformed-line count, exclusion flag). Sessions
are indexed from 1. Plateau is judged on the learning curve of the final
stage with the protocol's measure, rule and min_trials; the other rules that
apply and the above-chance marker are given beside it. Each session's
`start_drop` is the start-of-session drop of the final stage's fixed-window
fraction against the previous included session (None for the first, for an
excluded session or without trials). The `consolidation` key is left to the
caller. Every value is a plain JSON type.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any, NamedTuple

import numpy as np

from monitor.core.session.plateau import judge_all, learning_trial
from monitor.core.protocol import TrainingProtocol
from monitor.core.session.summary import SessionInput, learning_curve, summarize
from monitor.core.session.derivation import derive_session
from monitor.core.session.start_drop import fixed_window_drops
from monitor.core.session.trials import Trial


class SessionData(NamedTuple):
    """One session as the store hands it over: events or trials, and its facts."""

    events: Sequence[Any] | None = None
    trials: Sequence[Trial] | None = None
    start: str | None = None
    malformed_lines: int = 0
    excluded: bool = False
    exclusion_reason: str = ""
    stage: str | None = None  # the stage in force when the session began (events only)
    protocol_version: int | None = None


def plain(value: Any) -> Any:
    """numpy scalars, arrays and tuples as JSON types; nan and inf as None."""
    if isinstance(value, dict):
        return {str(k): plain(v) for k, v in value.items()}
    if isinstance(value, (list, tuple, np.ndarray)):
        return [plain(v) for v in value]
    if isinstance(value, (bool, np.bool_)):
        return bool(value)
    if isinstance(value, (int, np.integer)):
        return int(value)
    if isinstance(value, (float, np.floating)):
        return float(value) if math.isfinite(value) else None
    return value


def _session_input(protocol: TrainingProtocol, data: SessionData, valve_ul_per_ms: float | None) -> SessionInput:
    if data.events is not None:
        trials, counts, water = derive_session(protocol, data.stage, valve_ul_per_ms, data.events)
    else:
        trials, counts, water = list(data.trials or ()), {}, None
    return SessionInput(trials, data.start, data.malformed_lines, data.excluded, data.exclusion_reason,
                        counts, water, data.protocol_version)


def _result(result) -> dict[str, Any]:
    return {"reached": result.reached, "session": result.session, "rule": result.rule,
            "reason": result.reason, "figures": plain(result.figures)}


def _fixed_window_drops(protocol: TrainingProtocol, inputs: Sequence[SessionInput]) -> dict[int, float]:
    """Session index -> start-of-session drop of the final stage's fixed-window fraction (included sessions)."""
    kept = [(index, s.trials) for index, s in enumerate(inputs, start=1) if not s.excluded]
    final = protocol.final_stage.name
    return {d.session: d.drop for d in fixed_window_drops(final, protocol.fixed_window(final), kept)}


def animal_report(animal: str, protocol: TrainingProtocol, sessions: Sequence[SessionData],
                  valve_ul_per_ms: float | None = None) -> dict[str, Any]:
    """The report entry of one animal (without `consolidation`)."""
    inputs = [_session_input(protocol, data, valve_ul_per_ms) for data in sessions]
    drops = _fixed_window_drops(protocol, inputs)
    rows = []
    for index, session in enumerate(inputs, start=1):
        summary = summarize(protocol, session, index)
        f = summary.figures
        rows.append(plain({
            "index": index,
            "start": summary.start,
            "trials": f.trials,
            "hits": f.hits,
            "hit_rate": f.hit_rate,
            "median_interval_ms": f.median_interval_ms,
            "cv": f.cv,
            "malformed_lines": summary.malformed_lines,
            "stage": summary.stage,
            "stages": list(summary.stages),
            "protocol_version": summary.protocol_version,
            "premature": f.premature,
            "lone": f.lone,
            "omission": f.omission,
            "inter_trial": summary.inter_trial,
            "fixed_window_fraction": f.fixed_window_fraction,
            "median_abs_log_error": f.median_abs_log_error,
            "start_drop": drops.get(index),
            "disagreements": summary.disagreements,
            "water_ul": summary.water_ul,
            "excluded": summary.excluded,
            "exclusion_reason": summary.exclusion_reason,
        }))
    rule = protocol.plateau
    curve = learning_curve(protocol, inputs)
    results = judge_all(protocol, curve)
    main = results.pop(rule.rule)
    plateau = {
        "reached": main.reached,
        "session": main.session,
        "rule": main.rule,
        "measure": curve.measure,
        "stage": curve.stage,
        "min_trials": rule.min_trials,
        "reason": main.reason,
        "figures": plain(main.figures),
        "sessions_judged": [p.session for p in curve.points],
        "left_out": [{"session": s, "why": why} for s, why in curve.left_out],
        "other_rules": {name: _result(r) for name, r in results.items()},
        "above_chance": _result(learning_trial(curve, rule.chance)),
    }
    return {"animal": animal, "protocol": protocol.name, "protocol_version": protocol.version,
            "task": protocol.task, "sessions": rows, "plateau": plateau}
