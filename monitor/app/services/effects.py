"""Manipulations and their effects from the store: recording one, and the cohort's effects against the stage.

Rule: one place turns the store into effects, for the CLI and the window.
Sessions are named by their index in the animal's report (from 1).
`record_manipulation` freezes the stage at the last included session before
the first affected one (the cached fit's slow-state fraction at that session
with its interval and status, plateau, sessions and trials since plateau),
takes the animal's group from its latest `assigned` decision (only the code in
a blinded cohort), appends the hash-chained entry and flags the affected
sessions excluded (an acute manipulation's session, a lasting one's sessions
from the first affected on), so curves and fits leave them out. `effects`
computes, per manipulation in force, the effect against the baseline rule's
sessions (monitor.core.effects), against an acute test's control session,
and a lasting one's recovery; then per measure the trend of the tests' and of
the controls' effects against the slow-state fraction and the table by group
(`trend`, `groups`; the same against the control sessions: `trend_vs_control`,
`groups_vs_control`).
Group labels stay codes until the cohort is unblinded (`unblind`, recorded in
the store; the names come from the key file beside the database). Bad input
raises ValueError naming the field. Advisory figures: the approved animal-use
protocol, the animal-care committee and the veterinarian decide.
"""

from __future__ import annotations

from datetime import datetime
from typing import Any

from monitor.core.effects.animal import MEASURES, Candidate, SessionTrials, animal_effect, baseline_sessions
from monitor.core.effects.manipulation_log import ManipulationEntry, in_force, new_manipulation
from monitor.store.connection import Connection

ADVISORY = ("Advisory figures: a behavioural effect says what changed in the behaviour, not where in the brain; "
            "the approved animal-use protocol, the animal-care committee and the veterinarian decide.")
X_MEASURE = "slow_estimate"


def _now() -> str:
    return datetime.now().astimezone().isoformat(timespec="seconds")


def _sessions(conn: Connection, animal: str) -> tuple[list[dict[str, Any]], dict[str, Any]]:
    """The animal's report sessions (index, session_id, stage(s), excluded, trials, ...) and its report entry."""
    from monitor.store.reporting import animal_entry

    entry = animal_entry(conn, animal)
    if entry is None:
        raise ValueError(f"animal: {animal!r} has no session with a protocol")
    return entry["sessions"], entry


def _index_of(sessions: list[dict[str, Any]], index: int, name: str) -> dict[str, Any]:
    if not 1 <= index <= len(sessions):
        raise ValueError(f"{name}: session {index} does not exist (the animal has sessions 1-{len(sessions)})")
    return sessions[index - 1]


def stage_at(conn: Connection, entry: dict[str, Any], first_affected: int) -> dict[str, Any]:
    """The stage at the last included session before `first_affected` (see the module rule)."""
    from monitor.core.eligibility.from_report import figures_from_report
    from monitor.store.fits import data_fingerprint, latest_fit

    before = [s for s in entry["sessions"] if s["index"] < first_affected]
    plateau = dict(entry.get("plateau") or {})
    if plateau.get("session") is not None and plateau["session"] >= first_affected:
        plateau["reached"], plateau["session"] = False, None
    figures = figures_from_report({**entry, "sessions": before, "plateau": plateau})
    last = figures.session
    fit = latest_fit(conn, entry["animal"])
    estimate = next((s for s in (fit or {}).get("sessions", []) if s.get("session") == last), None)
    slow = {"slow_estimate": None, "slow_low": None, "slow_high": None, "slow_status": "not fitted"}
    if estimate is not None:
        slow = {"slow_estimate": estimate.get("estimate"), "slow_low": estimate.get("low"),
                "slow_high": estimate.get("high"), "slow_status": estimate.get("status")}
    elif fit is not None:
        slow["slow_status"] = f"no estimate at session {last}"
    return {"session": last, **slow, "plateau_reached": figures.plateau_reached,
            "plateau_session": figures.plateau_session, "sessions_since_plateau": figures.sessions_since_plateau,
            "trials_since_plateau": figures.trials_since_plateau, "protocol_name": figures.protocol_name,
            "protocol_version": figures.protocol_version,
            "fit_current": fit is not None and fit["fingerprint"] == data_fingerprint(conn, entry["animal"])}


def cohort_of(conn: Connection, animal: str) -> tuple[str | None, bool]:
    """(cohort, blinded): the eligibility rule's cohort of the protocol in force, else the animal record's."""
    from drivers.config import ConfigError, TomlFile
    from monitor.core.eligibility.rules import parse_eligibility
    from monitor.store.derive import protocol_of
    from monitor.store.manipulations import animal_cohort, latest_protocol_text

    text = latest_protocol_text(conn, animal)
    if text is not None:
        protocol = protocol_of(text)
        try:
            rule = parse_eligibility(protocol.eligibility, TomlFile(text, "<protocol in force>"),
                                     protocol_name=protocol.name, protocol_version=protocol.version)
        except ConfigError:
            rule = None
        if rule is not None:
            return rule.cohort_name, rule.blinded
    return animal_cohort(conn, animal), False


def record_manipulation(conn: Connection, *, animal: str, duration: str, role: str, what: str,
                        session: int, operator: str, reason: str, control_session: int | None = None,
                        group: str | None = None, time: str | None = None,
                        refresh_report: bool = True) -> ManipulationEntry:
    """Append a manipulation (caller holds BEGIN IMMEDIATE) and exclude its affected sessions.

    `refresh_report` rebuilds the animal's cached report entry at once (the window leaves it to its next read).
    """
    from monitor.store.manipulations import append_manipulation, assigned_group
    from monitor.store.registry import exclude_session
    from monitor.store.reporting import refresh_cache

    sessions, entry = _sessions(conn, animal)
    first = _index_of(sessions, session, "session")
    control = None if control_session is None else _index_of(sessions, control_session, "control session")
    cohort, blinded = cohort_of(conn, animal)
    name, code = assigned_group(conn, animal)
    if group is not None:                      # named by hand: a code in a blinded cohort
        name, code = (None, group) if blinded else (group, None)
    m = new_manipulation(animal=animal, duration=duration, role=role, what=what, session_id=first["session_id"],
                         operator=operator, reason=reason, time=time or _now(), stage=stage_at(conn, entry, session),
                         cohort=cohort, control_session_id=None if control is None else control["session_id"],
                         group=None if blinded else name, group_code=code)
    logged = append_manipulation(conn, m)
    affected = [first] if duration == "acute" else sessions[session - 1:]
    why = f"manipulation entry {logged.seq}: {what} ({duration}, {role})"
    for s in affected:
        if not s.get("excluded"):
            exclude_session(conn, s["session_id"], why, operator)
    if refresh_report:
        refresh_cache(conn, animal)      # else the report rebuilds the entry on its next read
    return logged


def withdraw_manipulation(conn: Connection, seq: int, operator: str, reason: str) -> ManipulationEntry:
    """Append an entry withdrawing entry `seq` (its sessions stay excluded: include them again by hand)."""
    from dataclasses import replace

    from monitor.store.manipulations import append_manipulation, entries

    found = [e for e in entries(conn) if e.seq == seq]
    if not found or found[0].manipulation.withdraws is not None:
        raise ValueError(f"withdraw: there is no manipulation entry {seq}")
    m = replace(found[0].manipulation, operator=operator, reason=reason, time=_now(), withdraws=seq)
    return append_manipulation(conn, new_manipulation(
        animal=m.animal, duration=m.duration, role=m.role, what=m.what, session_id=m.session_id,
        operator=operator, reason=reason, time=m.time, stage=m.stage_data(), cohort=m.cohort,
        control_session_id=m.control_session_id, group=m.group, group_code=m.group_code, withdraws=seq))


def unblind(conn: Connection, cohort: str, operator: str, reason: str) -> None:
    """Record that the cohort's group names may be shown from now on (caller holds BEGIN IMMEDIATE)."""
    from monitor.store.manipulations import unblind as store_unblind

    for name, value in (("cohort", cohort), ("operator", operator), ("reason", reason)):
        if not value or not value.strip():
            raise ValueError(f"{name} must be a non-empty text")
    store_unblind(conn, cohort, operator, reason, _now())


def _group_names(conn: Connection, cohorts: set[str]) -> dict[str, dict[str, str]]:
    """cohort -> {code: group name} for unblinded cohorts whose key file can be read."""
    from monitor.app.services.blinding import BlindingError, database_path, key_file, read_key
    from monitor.store.manipulations import unblinded

    db = database_path(conn)
    names: dict[str, dict[str, str]] = {}
    for cohort in set(unblinded(conn)) & cohorts:
        if db is None or not key_file(db, cohort).exists():
            continue
        try:
            _, _, key = read_key(key_file(db, cohort))
        except BlindingError:
            continue
        names[cohort] = {code: group for group, code in key.codes.items()}
    return names


class _Animal:
    """One animal's sessions as the report indexes them, with their trials (read once per `effects` call)."""

    def __init__(self, conn: Connection, animal: str) -> None:
        from monitor.store.derive import derive, trials_by_session
        from monitor.store.manipulations import report_sessions

        rows = report_sessions(conn, animal)
        trials = trials_by_session(conn, [r[0] for r in rows])
        self.sessions: list[dict[str, Any]] = []
        self.data: dict[int, tuple[list, float | None]] = {}
        for index, (sid, excluded, started, ended, _, _, derived) in enumerate(rows, start=1):
            attempts = trials.get(sid, [])
            if not derived:               # recorded live, not derived yet: derive in memory
                fresh = derive(conn, sid)
                attempts = fresh[0] if fresh is not None else []
            stages = tuple(dict.fromkeys(t.stage for t in attempts))
            self.sessions.append({"index": index, "session_id": sid, "excluded": bool(excluded), "stages": stages,
                                  "stage": attempts[-1].stage if attempts else None})
            minutes = (ended - started) / 60 if ended is not None and ended > started else \
                (max(t.t_us for t in attempts) / 60e6 if attempts else None)
            self.data[index] = (attempts, minutes)

    def trials(self, index: int, stage: str) -> SessionTrials:
        attempts, minutes = self.data[index]
        return SessionTrials(index, [t for t in attempts if t.stage == stage], minutes)


def _one_effect(animal: _Animal, e: ManipulationEntry, affected: set[int]) -> dict[str, Any]:
    """The effect record of one entry (an `error` instead of `effect` when it cannot be computed)."""
    m = e.manipulation
    sessions = animal.sessions
    by_id = {s["session_id"]: s for s in sessions}
    first = by_id.get(m.session_id)
    control = by_id.get(m.control_session_id) if m.control_session_id is not None else None
    out: dict[str, Any] = {"session": None if first is None else first["index"],
                           "control_session": None if control is None else control["index"]}
    if first is None or first["stage"] is None:
        return {**out, "error": "its session has no trials"}
    stage = first["stage"]
    candidates = [Candidate(s["index"], s["stages"], not s["excluded"] and s["session_id"] not in affected)
                  for s in sessions]
    chosen = baseline_sessions(candidates, first["index"], stage)
    if not chosen:
        return {**out, "error": f"no baseline: no usable session of stage {stage!r} before session {first['index']}"}
    later = [animal.trials(s["index"], stage) for s in sessions if s["index"] > first["index"]]
    result = animal_effect(animal.trials(first["index"], stage), [animal.trials(i, stage) for i in chosen],
                           control=None if control is None else animal.trials(control["index"], stage),
                           later=later if m.duration == "lasting" else None, seed=e.seq)
    return {**out, "stage_judged": stage, "effect": result.to_dict()}


def effects(conn: Connection, cohort: str | None = None) -> dict[str, Any]:
    """Every manipulation in force (of one cohort) with its effect, the trends and the table by group."""
    from monitor.core.effects.cohort import group_table, trend
    from monitor.store.manipulations import entries, unblinded

    current = [e for e in in_force(entries(conn)) if cohort is None or e.manipulation.cohort == cohort]
    if cohort is not None and not current:
        known = sorted({e.manipulation.cohort for e in entries(conn) if e.manipulation.cohort})
        raise ValueError(f"cohort: no manipulation recorded in cohort {cohort!r} (cohorts: {', '.join(known) or 'none'})")
    affected: dict[str, set[int]] = {}
    for e in current:
        m = e.manipulation
        ids = affected.setdefault(m.animal, set())
        ids.update(x for x in (m.session_id, m.control_session_id) if x is not None)
    cohorts = {e.manipulation.cohort for e in current if e.manipulation.cohort}
    names = _group_names(conn, cohorts)
    opened = unblinded(conn)
    rows = []
    animals: dict[str, _Animal] = {}
    for e in current:
        m = e.manipulation
        group, shown = m.group, "name"
        if group is None and m.group_code is not None:
            real = names.get(m.cohort or "", {}).get(m.group_code)
            group, shown = (real, "name") if real else (m.group_code, "code")
        record = {"seq": e.seq, "animal": m.animal, "cohort": m.cohort, "group": group, "group_shown_as": shown,
                  "duration": m.duration, "role": m.role, "what": m.what, "time": m.time, "operator": m.operator,
                  "reason": m.reason, "stage": m.stage_data()}
        if m.animal not in animals:
            animals[m.animal] = _Animal(conn, m.animal)
        record.update(_one_effect(animals[m.animal], e, affected.get(m.animal, set()) - {m.session_id}))
        rows.append(record)
    out: dict[str, Any] = {"advisory": ADVISORY, "x": X_MEASURE, "manipulations": rows}
    for against, suffix in (("vs_baseline", ""), ("vs_control", "_vs_control")):
        trends: dict[str, dict[str, Any]] = {}
        tables: dict[str, list[dict[str, Any]]] = {}
        for measure in MEASURES:
            points = cohort_points(rows, measure, against)
            trends[measure] = {}
            for role in ("test", "control"):
                fitted = trend([p.x for p in points if p.role == role], [p.y for p in points if p.role == role])
                trends[measure][role] = None if fitted is None else {**fitted.to_dict(), "line": _line(fitted)}
            tables[measure] = [r.to_dict() for r in group_table(points)]
        out["trend" + suffix], out["groups" + suffix] = trends, tables
    out["unblinded"] = sorted(c for c in cohorts if c in opened)
    return out


def _line(fitted) -> dict[str, list[float]]:
    """The fitted line and its interval at x = 0, 0.05, ..., 1 (for the cohort plot)."""
    grid = [i / 20 for i in range(21)]
    fit, low, high = fitted.line(grid)
    return {"x": grid, "fit": [float(v) for v in fit], "low": [float(v) for v in low], "high": [float(v) for v in high]}


def cohort_points(rows: list[dict[str, Any]], measure: str, against: str = "vs_baseline") -> list:
    """Points of one measure: x the slow-state fraction at the time (nan: not known), y the effect
    `against` its baseline (`vs_baseline`) or its control session (`vs_control`)."""
    from monitor.core.effects.cohort import Point

    points = []
    for r in rows:
        est = ((r.get("effect") or {}).get(against) or {}).get(measure) or {}
        stage = r["stage"]
        if est.get("effect") is None:
            continue
        x = stage.get(X_MEASURE)
        points.append(Point(r["animal"], r["group"], r["role"], float("nan") if x is None else x,
                            stage.get("slow_low"), stage.get("slow_high"), est["effect"], est.get("low"),
                            est.get("high")))
    return points


CSV_COLUMNS = ("seq", "animal", "cohort", "group", "role", "duration", "what", "time", "session",
               "control_session", "stage_session", "slow_estimate", "slow_low", "slow_high", "slow_status",
               "sessions_since_plateau", "trials_since_plateau", "measure", "baseline_sessions", "baseline",
               "baseline_range_low", "baseline_range_high", "affected", "effect", "low", "high", "vs_control", "vs_control_low", "vs_control_high",
               "recovered", "recovery_sessions", "error")


def csv_rows(result: dict[str, Any]) -> list[dict[str, Any]]:
    """One row per manipulation and measure (CSV_COLUMNS)."""
    out = []
    for r in result["manipulations"]:
        stage, eff = r["stage"], r.get("effect") or {}
        rec = eff.get("recovery") or {}
        for measure in MEASURES:
            base = (eff.get("vs_baseline") or {}).get(measure) or {}
            ctl = (eff.get("vs_control") or {}).get(measure) or {}
            spread = (eff.get("baseline_range") or {}).get(measure) or (None, None)
            row = {k: r.get(k) for k in ("seq", "animal", "cohort", "group", "role", "duration", "what", "time",
                                         "session", "control_session", "error")}
            row.update({"stage_session": stage.get("session"), "measure": measure,
                        "baseline_sessions": " ".join(map(str, eff.get("baseline_sessions", []))),
                        "baseline": base.get("baseline"), "baseline_range_low": spread[0],
                        "baseline_range_high": spread[1], "affected": base.get("affected"),
                        "effect": base.get("effect"), "low": base.get("low"), "high": base.get("high"),
                        "vs_control": ctl.get("effect"), "vs_control_low": ctl.get("low"),
                        "vs_control_high": ctl.get("high"), "recovered": rec.get("recovered"),
                        "recovery_sessions": rec.get("sessions")})
            for k in ("slow_estimate", "slow_low", "slow_high", "slow_status", "sessions_since_plateau",
                      "trials_since_plateau"):
                row[k] = stage.get(k)
            out.append({k: "" if row.get(k) is None else row[k] for k in CSV_COLUMNS})
    return out
