"""Judging an animal, recording a decision and reading the care day: shared by the CLI and the window.

Rule: one place turns the store into what a person decides on. `judge(conn,
animal)` takes the animal's figures from the same data as `rigside report`
(stored trials, cached consolidation fit), reads the eligibility rule of the
protocol in force and returns the figures with the rule's verdict (the
verdict "no eligibility rule" when the protocol has none). For a blinded
cohort (`[eligibility] blinded = true`) the rule's groups are renamed to their
codes before judging (monitor.app.services.blinding keeps the key beside the
database), so the verdict, its alerts, the dialog and the log speak codes
only. `record_decision`
freezes those figures and the verdict in a new hash-chained entry inside the
caller's transaction; the person decides, so an entry that disagrees with
the rule is recorded with both. `care_day` gives each animal's care day from
the care log and the sessions; `care_line` says it in one line. Bad input
raises ValueError (or RecordError) naming the field; no Qt here. Advisory:
the approved animal-use protocol, the animal-care committee and the
veterinarian decide.
"""

from __future__ import annotations

import csv
from dataclasses import replace
from datetime import date, datetime, timedelta
from pathlib import Path
from typing import Any, NamedTuple, Sequence

from monitor.core.eligibility.assignment import BlindingKey
from monitor.core.care.ledger import CARE_SHEET_COLUMNS, CareConfig, DaySummary, care_sheet
from monitor.core.eligibility.decision_log import LogEntry, new_decision
from monitor.core.eligibility.rules import EligibilityRule
from monitor.core.eligibility.figures import AnimalFigures
from monitor.core.eligibility.verdict import Verdict
from monitor.store.connection import Connection

NO_RULE = "no eligibility rule"
CARE_CAUTION = ("Advisory figures: the approved animal-use protocol, the animal-care committee and the veterinarian "
                "decide; follow local rules.")
CARE_HISTORY_DAYS = 3   # sessions older than this are not read for the care day (last fluid is then "none")


class RuleError(ValueError):
    """The protocol in force has an eligibility rule that cannot be read."""


class Judgement(NamedTuple):
    """An animal's figures and the rule's verdict on them (rule None: the protocol has none).

    When blinded, `rule` and `verdict` name groups by their codes and `blinding` holds the key.
    """

    figures: AnimalFigures
    rule: EligibilityRule | None
    verdict: Verdict
    blinding: BlindingKey | None = None

    def real_group(self, group: str) -> str:
        """The group's name behind a code (the name itself when not blinded)."""
        return group if self.blinding is None else self.blinding.group_of(group)


def judge(conn: Connection, animal: str) -> Judgement | None:
    """The figures and verdict as of the animal's latest session; None when it has no session with a protocol."""
    from drivers.config import ConfigError, TomlFile
    from monitor.core.eligibility.rules import parse_eligibility
    from monitor.core.eligibility.from_report import figures_from_report
    from monitor.core.eligibility.verdict import evaluate
    from monitor.store.derive import protocol_of
    from monitor.store.reporting import animal_entry

    entry = animal_entry(conn, animal)
    if entry is None:
        return None
    figures = figures_from_report(entry, entry["consolidation"])
    text = conn.execute("SELECT protocol_text FROM sessions WHERE animal = ? AND protocol_text IS NOT NULL "
                        "ORDER BY started_at DESC, id DESC LIMIT 1", (animal,)).fetchone()[0]
    protocol = protocol_of(text)
    try:
        rule = parse_eligibility(protocol.eligibility, TomlFile(text, "<protocol in force>"),
                                 protocol_name=protocol.name, protocol_version=protocol.version)
    except ConfigError as exc:
        raise RuleError(f"the protocol in force has a bad [eligibility] rule ({exc})") from None
    if rule is None:
        verdict = Verdict(animal, NO_RULE, NO_RULE, (), (),
                          "The protocol in force has no [eligibility] rule; the figures are recorded as they were.",
                          figures.session, figures.protocol_version)
        return Judgement(figures, None, verdict)
    if not rule.blinded:
        return Judgement(figures, rule, evaluate(rule, figures))
    key = _blinding(conn, rule)
    coded = rule.under_codes(key.codes)
    figures = replace(figures, forecast={key.code_of(g): f for g, f in figures.forecast.items() if g in key.codes})
    return Judgement(figures, coded, evaluate(coded, figures), key)


def _blinding(conn: Connection, rule: EligibilityRule) -> BlindingKey:
    from monitor.app.services.blinding import BlindingError, cohort_key, database_path

    db = database_path(conn)
    if db is None:
        raise RuleError("a blinded cohort needs a database file (its key is kept beside it)")
    try:
        return cohort_key(db, rule.cohort_name, [g.name for g in rule.groups])
    except BlindingError as exc:
        raise RuleError(str(exc)) from None


def record_decision(conn: Connection, judgement: Judgement, *, decision: str, operator: str, reason: str,
                    group: str | None = None, group_code: str | None = None, blinded: bool = False,
                    planned_manipulation: str | None = None, planned_date: str | None = None,
                    assignment_method: str | None = None, assignment_seed: int | None = None,
                    corrects: int | None = None, time: str | None = None) -> LogEntry:
    """Append the decision with its frozen figures and verdict (caller holds BEGIN IMMEDIATE); ValueError on bad input."""
    from monitor.store.decisions import append_decision

    rule, verdict = judgement.rule, judgement.verdict
    if judgement.blinding is not None and group:
        if rule is None or rule.group(group) is None:
            raise ValueError(f"the cohort is blinded: name the group by its code "
                             f"({', '.join(sorted(judgement.blinding.codes.values()))})")
        group_code, blinded = group, True
    elif rule is not None and decision == "eligible" and group and rule.group(group) is None:
        raise ValueError(f"the rule has no group {group!r} (groups: {', '.join(g.name for g in rule.groups)})")
    entry = new_decision(
        decision=decision, animal=judgement.figures.animal, operator=operator, reason=reason,
        time=time or datetime.now().astimezone().isoformat(timespec="seconds"), figures=judgement.figures,
        verdict=verdict, group=group, group_code=group_code, blinded=blinded,
        planned_manipulation=planned_manipulation, planned_date=planned_date, assignment_method=assignment_method,
        assignment_seed=assignment_seed, corrects=corrects)
    if rule is None:
        entry = replace(entry, disagrees_with_rule=False)    # nothing to disagree with
    return append_decision(conn, entry)


def care_day(conn: Connection, names: Sequence[str], day: date, config: CareConfig,
             now: datetime) -> tuple[DaySummary, ...]:
    """Each named animal's care day (name order), judged at `now`; sessions older than a few days are skipped."""
    from monitor.store.care_log import animal_care

    since = datetime.combine(day - timedelta(days=CARE_HISTORY_DAYS), datetime.min.time(), tzinfo=now.tzinfo)
    return care_sheet([animal_care(conn, name, config, since=since) for name in names], day, config, now)


def care_line(s: DaySummary) -> str:
    """One animal's care day in one line (water with its parts and what is owed, weight with percent of baseline)."""
    weight = "no weight" if s.weight_g is None else f"{s.weight_g:.1f} g" + (
        f" ({s.percent_of_baseline:.1f} % of baseline)" if s.percent_of_baseline is not None else "")
    if s.weighed_on is not None and s.weighed_on != s.day:
        weight += f", weighed {s.weighed_on.isoformat()}"
    minimum = "" if s.minimum_ml is None else f" of {s.minimum_ml:.2f} ml minimum"
    owed = f", owed {s.owed_ml:.2f} ml" if s.owed_ml else ""
    return (f"Water {s.total_ml:.2f} ml{minimum} ({s.earned_ml:.2f} earned + {s.supplement_ml:.2f} "
            f"supplement){owed}; {weight}")


def write_care_csv(path: Path, summaries: Sequence[DaySummary]) -> None:
    """The care sheet as CSV (CARE_SHEET_COLUMNS; cells that a spreadsheet would run are made safe)."""
    from monitor.store.csv_export import atomic_file, safe_cell

    with atomic_file(Path(path)) as out:  # an interrupted write leaves no partial sheet
        writer = csv.writer(out)
        writer.writerow(CARE_SHEET_COLUMNS)
        for s in summaries:
            row: dict[str, Any] = s.row()
            writer.writerow([safe_cell(row[c]) for c in CARE_SHEET_COLUMNS])
