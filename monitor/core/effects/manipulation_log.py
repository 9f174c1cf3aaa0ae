"""The manipulation log: append-only entries, hash-chained like the decision log.

Rule: an entry records one manipulation of one animal: acute (its effect is
judged on one test session; a test may name its control session, the vehicle
or sham day) or lasting (every session from the first affected one on), its
role (test or control), what was done, the first affected session, the group
(or only its code in a blinded cohort), who, why and when (ISO 8601 with a
UTC offset), and the stage at the last session before it, frozen as
canonical JSON (the slow-state fraction with its interval and status,
sessions and trials since plateau). A mistake is never edited: a new entry
`withdraws` the earlier one. Each entry's content, with the previous entry's
hash, is hashed as canonical JSON with SHA-256 (monitor.core.eligibility.decision_log's
`canonical_json` and `digest`); the first chains to 64 zeros. Pure.
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from datetime import datetime
from typing import Any, Mapping, Sequence

from monitor.core.eligibility.decision_log import GENESIS, canonical_json, digest

FORMAT = "rigside-manipulation 1"
DURATIONS = ("acute", "lasting")
ROLES = ("test", "control")
STAGE_KEYS = ("session", "slow_estimate", "slow_low", "slow_high", "slow_status", "plateau_reached",
              "plateau_session", "sessions_since_plateau", "trials_since_plateau", "protocol_name",
              "protocol_version", "fit_current")


@dataclass(frozen=True, slots=True)
class Manipulation:
    """What was done, before it is chained into the log."""

    animal: str
    duration: str
    role: str
    what: str
    session_id: int
    operator: str
    reason: str
    time: str
    stage: str  # canonical JSON of the stage at the time
    cohort: str | None = None
    control_session_id: int | None = None
    group: str | None = None
    group_code: str | None = None
    withdraws: int | None = None

    def stage_data(self) -> dict[str, Any]:
        """A fresh copy of the frozen stage."""
        return json.loads(self.stage)


def _text(name: str, value: Any, required: bool = True) -> None:
    if value is None and not required:
        return
    if not isinstance(value, str) or not value.strip():
        raise ValueError(f"{name} must be a non-empty text")


def _moment(value: Any) -> None:
    try:
        aware = isinstance(value, str) and "T" in value and datetime.fromisoformat(value).tzinfo is not None
    except ValueError:
        aware = False
    if not aware:
        raise ValueError(f"time must be an ISO 8601 date-time with a UTC offset, got {value!r}")


def new_manipulation(*, animal: str, duration: str, role: str, what: str, session_id: int, operator: str,
                     reason: str, time: str, stage: Mapping[str, Any], cohort: str | None = None,
                     control_session_id: int | None = None, group: str | None = None,
                     group_code: str | None = None, withdraws: int | None = None) -> Manipulation:
    """A validated entry; ValueError names the bad field."""
    if duration not in DURATIONS:
        raise ValueError(f"duration must be one of {', '.join(DURATIONS)}, got {duration!r}")
    if role not in ROLES:
        raise ValueError(f"role must be one of {', '.join(ROLES)}, got {role!r}")
    for name, value in (("animal", animal), ("what", what), ("operator", operator), ("reason", reason)):
        _text(name, value)
    _moment(time)
    if control_session_id is not None and (duration != "acute" or role != "test"):
        raise ValueError("control session: only an acute test names its control session")
    if control_session_id is not None and control_session_id == session_id:
        raise ValueError("control session: the control is another session than the test")
    if withdraws is not None and (isinstance(withdraws, bool) or not isinstance(withdraws, int) or withdraws < 1):
        raise ValueError("withdraws must be the seq of an earlier entry")
    unknown = set(stage) - set(STAGE_KEYS)
    if unknown:
        raise ValueError(f"stage: unknown keys {', '.join(sorted(unknown))}")
    return Manipulation(animal, duration, role, what, session_id, operator, reason, time,
                        canonical_json(dict(stage)), cohort, control_session_id, group, group_code, withdraws)


@dataclass(frozen=True, slots=True)
class ManipulationEntry:
    """One chained entry; `seq` (from 1) is its id."""

    seq: int
    prev_hash: str
    manipulation: Manipulation
    hash: str = ""

    def content(self) -> dict[str, Any]:
        m = self.manipulation
        return {"format": FORMAT, "seq": self.seq, "prev_hash": self.prev_hash, "animal": m.animal,
                "cohort": m.cohort, "duration": m.duration, "role": m.role, "what": m.what,
                "session_id": m.session_id, "control_session_id": m.control_session_id, "group": m.group,
                "group_code": m.group_code, "operator": m.operator, "reason": m.reason, "time": m.time,
                "stage": m.stage_data(), "withdraws": m.withdraws}

    def payload(self) -> str:
        return canonical_json(self.content())

    @classmethod
    def from_content(cls, c: Mapping[str, Any], hash: str) -> "ManipulationEntry":
        stage = c["stage"]
        stage = canonical_json(json.loads(stage) if isinstance(stage, str) else stage)
        m = Manipulation(c["animal"], c["duration"], c["role"], c["what"], c["session_id"], c["operator"],
                         c["reason"], c["time"], stage, c.get("cohort"), c.get("control_session_id"),
                         c.get("group"), c.get("group_code"), c.get("withdraws"))
        return cls(c["seq"], c["prev_hash"], m, hash)


def append(previous: ManipulationEntry | None, manipulation: Manipulation,
           withdrawn: ManipulationEntry | None = None) -> ManipulationEntry:
    """The next entry after `previous`, hashed; a withdrawal must be given the entry it withdraws."""
    if manipulation.withdraws is not None:
        if withdrawn is None or withdrawn.seq != manipulation.withdraws:
            raise ValueError(f"withdraws: there is no entry {manipulation.withdraws}")
        if withdrawn.manipulation.animal != manipulation.animal:
            raise ValueError(f"withdraws: entry {withdrawn.seq} is about {withdrawn.manipulation.animal!r}")
    seq = 1 if previous is None else previous.seq + 1
    entry = ManipulationEntry(seq, GENESIS if previous is None else previous.hash, manipulation)
    return ManipulationEntry(seq, entry.prev_hash, manipulation, digest(entry.payload(), None))


def first_broken(entries: Sequence[ManipulationEntry]) -> str | None:
    """None when the chain holds; else a sentence naming the first broken entry."""
    for index, entry in enumerate(entries):
        if entry.seq != index + 1:
            return f"entry {entry.seq} (position {index + 1}): expected entry {index + 1} here"
        previous = GENESIS if index == 0 else entries[index - 1].hash
        if entry.prev_hash != previous:
            return f"entry {entry.seq}: does not chain to the entry before it"
        if digest(entry.payload(), None) != entry.hash:
            return f"entry {entry.seq}: its content does not match its hash (edited)"
    return None


def in_force(entries: Sequence[ManipulationEntry]) -> list[ManipulationEntry]:
    """Entries that record a manipulation and have not been withdrawn, in order."""
    withdrawn = {e.manipulation.withdraws for e in entries if e.manipulation.withdraws is not None}
    return [e for e in entries if e.manipulation.withdraws is None and e.seq not in withdrawn]
