"""Assignment plans in the store: one insert-only row per cohort, and who has been assigned under it.

Rule: a cohort's plan (method, seed, groups, per_block, blinded) is written
once, in the caller's `BEGIN IMMEDIATE` transaction, the first time one of its
animals is assigned at random; triggers refuse any later UPDATE or DELETE, so
the recorded seed is the one every draw used. How many animals went before
the next one is read from the decision log itself (`assigned` entries carrying
the plan's method and seed), so the log alone is enough to redo every draw.
"""

from __future__ import annotations

import json
import sqlite3
from dataclasses import dataclass


@dataclass(frozen=True, slots=True)
class Plan:
    """How a cohort's animals are drawn into its groups."""

    cohort: str
    method: str
    seed: int
    groups: tuple[str, ...]       # the rule's group names, in the rule's order
    per_block: int
    blinded: bool
    created_at: str               # ISO 8601 with UTC offset


def find_plan(conn: sqlite3.Connection, cohort: str) -> Plan | None:
    row = conn.execute("SELECT cohort, method, seed, groups, per_block, blinded, created_at FROM assignment_plans "
                       "WHERE cohort = ?", (cohort,)).fetchone()
    if row is None:
        return None
    return Plan(row[0], row[1], int(row[2]), tuple(json.loads(row[3])), int(row[4]), bool(row[5]), row[6])


def add_plan(conn: sqlite3.Connection, plan: Plan) -> Plan:
    """Insert the plan (caller holds BEGIN IMMEDIATE); sqlite3.IntegrityError if the cohort has one."""
    conn.execute("INSERT INTO assignment_plans (cohort, method, seed, groups, per_block, blinded, created_at) "
                 "VALUES (?, ?, ?, ?, ?, ?, ?)", (plan.cohort, plan.method, plan.seed, json.dumps(list(plan.groups)),
                                                  plan.per_block, int(plan.blinded), plan.created_at))
    return plan


def drawn_animals(conn: sqlite3.Connection, plan: Plan) -> list[str]:
    """Animals assigned under the plan (its method and seed), in log order, each once."""
    rows = conn.execute("SELECT animal FROM decisions WHERE decision = 'assigned' AND assignment_method = ? "
                        "AND assignment_seed = ? ORDER BY id", (plan.method, plan.seed))
    return list(dict.fromkeys(r[0] for r in rows))
