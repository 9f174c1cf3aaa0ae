"""Random assignment of a cohort's animals to its groups: the plan, the draw and the `assigned` entry.

Rule: one function draws, for the CLI (`rigside assign`) and the window's
decision dialog alike, and it never looks at an animal's figures. The
cohort's plan (monitor.store.plans) is made the first time it is needed: the
method and per_block come from the eligibility rule, the seed from
`new_seed()`, and the plan is recorded before any draw. With
`blocks-sha256-v1` the k-th animal assigned in the cohort (k from 0, counted
from the log) gets entry k of the permuted blocks; with `cohort-sha256-v1` a
listed set of animals is dealt at once. In a blinded cohort the draw is among
the groups' codes, so the seed in the log re-derives codes, never groups.
Each result is recorded through `animal_records.record_decision` as an
`assigned` entry with the method and seed; the caller holds BEGIN IMMEDIATE.
Refusals raise `AssignError` with one sentence. Advisory: the approved
protocol, the animal-care committee and the veterinarian decide.
"""

from __future__ import annotations

from datetime import datetime
from typing import NamedTuple, Sequence

from monitor.app.services.judging import Judgement, record_decision
from monitor.core.eligibility.assignment import BLOCKS_METHOD, COHORT_METHOD, assign_cohort, assign_next, new_seed
from monitor.core.eligibility.decision_log import LogEntry
from monitor.store.connection import Connection
from monitor.store.plans import Plan, add_plan, drawn_animals, find_plan

RULE_WORD = {BLOCKS_METHOD: "blocks", COHORT_METHOD: "cohort"}   # the `[eligibility] assignment` word


class AssignError(ValueError):
    """A draw that cannot be made: the sentence says why."""


class Draw(NamedTuple):
    """The group drawn for one animal (its code when blinded) and how to redo it."""

    animal: str
    cohort: str
    method: str
    seed: int
    position: int       # animals of the cohort assigned before this one
    group: str
    blinded: bool


def _plan(conn: Connection, j: Judgement) -> Plan:
    """The cohort's plan, made and recorded now when it has none; AssignError when it cannot be used."""
    rule = j.rule
    if rule is None:
        raise AssignError("the protocol in force has no [eligibility] groups to assign to")
    if len(rule.groups) < 2:
        raise AssignError(f"cohort {rule.cohort_name!r} has one group only; random assignment needs two or more")
    names = tuple(j.real_group(g.name) for g in rule.groups)
    plan = find_plan(conn, rule.cohort_name)
    if plan is None:
        return add_plan(conn, Plan(rule.cohort_name, rule.assignment, new_seed(), names, rule.per_block,
                                   rule.blinded, datetime.now().astimezone().isoformat(timespec="seconds")))
    if (plan.method, plan.groups, plan.per_block, plan.blinded) != (rule.assignment, names, rule.per_block,
                                                                    rule.blinded):
        raise AssignError(f"the rule in force no longer matches cohort {plan.cohort!r}'s assignment plan of "
                          f"{plan.created_at} ({RULE_WORD.get(plan.method, plan.method)}, groups "
                          f"{', '.join(plan.groups)}, per_block {plan.per_block}, blinded "
                          f"{str(plan.blinded).lower()}); a plan is never changed: use a new cohort name")
    return plan


def _not_assigned(conn: Connection, animal: str) -> None:
    from monitor.store.decisions import entries

    done = [e for e in entries(conn, animal) if e.decision.decision == "assigned"]
    if done:
        d = done[-1].decision
        raise AssignError(f"{animal} is already assigned (entry {done[-1].seq}, to {d.group or d.group_code}); "
                          f"a correction is a new entry (rigside decide --corrects {done[-1].seq})")


def draw_next(conn: Connection, j: Judgement) -> Draw:
    """The next animal's group under the cohort's blocks plan (the plan is recorded if new)."""
    animal = j.figures.animal
    _not_assigned(conn, animal)
    plan = _plan(conn, j)
    if plan.method != BLOCKS_METHOD:
        raise AssignError(f"cohort {plan.cohort!r} is assigned as a whole (assignment = \"cohort\"): list its "
                          "animals together (rigside assign --animals ...)")
    position = len(drawn_animals(conn, plan))
    group = assign_next(position, [g.name for g in j.rule.groups], plan.seed, plan.per_block)
    return Draw(animal, plan.cohort, plan.method, plan.seed, position, group, plan.blinded)


def record_draw(conn: Connection, j: Judgement, draw: Draw, *, operator: str, reason: str,
                planned_manipulation: str | None = None, planned_date: str | None = None) -> LogEntry:
    """Draw again inside this transaction and record it; AssignError if it is not the draw shown."""
    now = draw_next(conn, j)
    if now != draw:
        raise AssignError(f"another animal of cohort {draw.cohort!r} was assigned since the draw was shown; "
                          "draw again")
    return record_decision(conn, j, decision="assigned", group=draw.group, operator=operator, reason=reason,
                           planned_manipulation=planned_manipulation, planned_date=planned_date,
                           assignment_method=draw.method, assignment_seed=draw.seed)


def assign_listed(conn: Connection, judgements: Sequence[Judgement], *, operator: str,
                  reason: str) -> list[tuple[Draw, LogEntry]]:
    """Deal a listed set of a cohort's animals at once (cohort-sha256-v1) and record each."""
    cohorts = {j.rule.cohort_name if j.rule is not None else None for j in judgements}
    if len(cohorts) != 1:
        raise AssignError("the animals listed belong to different cohorts (or have no rule): list one cohort")
    for j in judgements:
        _not_assigned(conn, j.figures.animal)
    first = judgements[0]
    plan = _plan(conn, first)
    if plan.method != COHORT_METHOD:
        raise AssignError(f"cohort {plan.cohort!r} is assigned one animal at a time (assignment = \"blocks\"): "
                          "assign each with --animal")
    if drawn_animals(conn, plan):
        raise AssignError(f"cohort {plan.cohort!r} was already dealt as a whole; a second deal would not be "
                          "balanced with the first")
    result = assign_cohort([j.figures.animal for j in judgements], [g.name for g in first.rule.groups], plan.seed)
    out = []
    for position, j in enumerate(judgements):
        draw = Draw(j.figures.animal, plan.cohort, plan.method, plan.seed, position,
                    result.animals[j.figures.animal], plan.blinded)
        out.append((draw, record_decision(conn, j, decision="assigned", group=draw.group, operator=operator,
                                          reason=reason, assignment_method=plan.method,
                                          assignment_seed=plan.seed)))
    return out
