"""The decision log: append-only entries, hash-chained so that tampering shows.

Rule: an entry records a person's decision (eligible | assigned | deferred |
excluded) about one animal with who, why, when (ISO 8601 with a UTC offset),
the planned manipulation and date, the assignment method and seed, and a
frozen snapshot of the figures and the rule's own verdict behind it. The
person decides: when the decision disagrees with the verdict both are kept and
`disagrees_with_rule` is set. Entries are never changed: a correction is a new
entry whose `corrects` names the earlier entry's `seq`. Each entry's content,
which includes the previous entry's hash, is written as canonical JSON
(`canonical_json`: sorted keys, no spaces, UTF-8, integers as integers, floats
finite in Python's shortest round-trip form, -0.0 as 0.0) and hashed with
SHA-256, or with HMAC-SHA256 under a per-database key; the first entry chains
to 64 zeros. `verify_chain` names the first broken entry and why. Pure: the
store keeps the entries; reading and writing them is the caller's business.
"""

from __future__ import annotations

import hashlib
import hmac
import json
import math
from dataclasses import dataclass, field
from datetime import date, datetime
from typing import Any, Mapping, Sequence

from monitor.core.eligibility.figures import AnimalFigures
from monitor.core.eligibility.verdict import NOT_YET, OPEN, Verdict

FORMAT = "rigside-decision 1"
DECISIONS = ("eligible", "assigned", "deferred", "excluded")
GENESIS = "0" * 64
PLAIN, KEYED = "sha256", "hmac-sha256"
DECISION_CSV_COLUMNS = ("seq", "time", "animal", "decision", "group", "group_code", "operator", "reason",
                        "planned_manipulation", "planned_date", "assignment_method", "assignment_seed",
                        "rule_state", "disagrees_with_rule", "corrects", "plateau_session",
                        "sessions_since_plateau", "trials_since_plateau", "measures", "slow_estimate",
                        "slow_low", "slow_high", "slow_status", "protocol_version", "prev_hash", "hash")


def _plain(value: Any) -> Any:
    """JSON-ready copy with the canonical rules applied; TypeError/ValueError otherwise."""
    if value is None or isinstance(value, (bool, str)):
        return value
    if isinstance(value, int):
        return int(value)
    if isinstance(value, float):
        if not math.isfinite(value):
            raise ValueError(f"non-finite number {value!r} cannot be logged (use null for 'not known')")
        return 0.0 if value == 0 else value
    if isinstance(value, Mapping):
        if not all(isinstance(k, str) for k in value):
            raise TypeError("object keys must be strings")
        return {k: _plain(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_plain(v) for v in value]
    raise TypeError(f"{type(value).__name__} cannot be logged")


def canonical_json(value: Any) -> str:
    """The one text of `value` that gets hashed (see the module rule)."""
    return json.dumps(_plain(value), sort_keys=True, separators=(",", ":"), ensure_ascii=False, allow_nan=False)


@dataclass(frozen=True, slots=True)
class Snapshot:
    """The figures and verdict at decision time, kept as canonical text (immutable)."""

    text: str

    @classmethod
    def of(cls, figures: AnimalFigures, verdict: Verdict) -> "Snapshot":
        return cls(canonical_json({"figures": figures.to_dict(), "verdict": verdict.to_dict()}))

    def data(self) -> dict[str, Any]:
        """A fresh copy every call: changing it changes nothing recorded."""
        return json.loads(self.text)

    def figures(self) -> AnimalFigures:
        return AnimalFigures.from_dict(self.data()["figures"])


@dataclass(frozen=True, slots=True)
class Decision:
    """What a person decided, before it is chained into the log."""

    decision: str
    animal: str
    operator: str
    reason: str
    time: str  # ISO 8601 with UTC offset
    group: str | None = None  # None when blinded (then group_code is set)
    group_code: str | None = None
    planned_manipulation: str | None = None
    planned_date: str | None = None  # ISO date, or date-time with offset
    assignment_method: str | None = None
    assignment_seed: int | None = None
    snapshot: Snapshot | None = None
    rule_state: str | None = None
    disagrees_with_rule: bool = False
    corrects: int | None = None


def rule_agrees(decision: str, group: str | None, verdict: Verdict) -> bool:
    """Whether the rule's verdict supports the decision (see docs/eligibility.md).

    eligible: the named group's window (or any window) is open; assigned to a
    group of the rule: its window is open or still ahead; assigned to another
    arm: some window is open; deferred / excluded: no window is open.
    """
    status = verdict.status(group) if group else None
    if decision == "eligible":
        return status.state == OPEN if status else bool(verdict.open_groups)
    if decision == "assigned":
        return status.state in (OPEN, NOT_YET) if status else bool(verdict.open_groups)
    return not verdict.open_groups


def _text(name: str, value: Any, required: bool = True) -> str | None:
    if value is None and not required:
        return None
    if not isinstance(value, str) or not value.strip():
        raise ValueError(f"{name} must be a non-empty text")
    return value


def _when(name: str, value: str, date_allowed: bool = False) -> str:
    try:
        moment = datetime.fromisoformat(value)
    except (TypeError, ValueError):
        moment = None
    if moment is not None and moment.tzinfo is not None and "T" in value:
        return value
    if date_allowed:
        try:
            date.fromisoformat(value)
            return value
        except (TypeError, ValueError):
            pass
    raise ValueError(f"{name} must be ISO 8601 {'date or ' if date_allowed else ''}date-time with a UTC offset, "
                     f"got {value!r}")


def new_decision(*, decision: str, animal: str, operator: str, reason: str, time: str,
                 figures: AnimalFigures | None, verdict: Verdict | None, group: str | None = None,
                 group_code: str | None = None, blinded: bool = False, planned_manipulation: str | None = None,
                 planned_date: str | None = None, assignment_method: str | None = None,
                 assignment_seed: int | None = None, corrects: int | None = None) -> Decision:
    """A validated decision with its frozen snapshot; ValueError names the bad field.

    `group` is the real group name (used to compare with the rule); with
    `blinded=True` only `group_code` is recorded.
    """
    if decision not in DECISIONS:
        raise ValueError(f"decision must be one of {', '.join(DECISIONS)}, got {decision!r}")
    for name, value in (("animal", animal), ("operator", operator), ("reason", reason)):
        _text(name, value)
    _when("time", time)
    if planned_date is not None:
        _when("planned_date", planned_date, date_allowed=True)
    _text("planned_manipulation", planned_manipulation, required=False)
    if decision == "assigned" and not (group or group_code):
        raise ValueError("an assignment names a group (or its code)")
    if blinded and not group_code:
        raise ValueError("a blinded decision records a group code")
    if assignment_seed is not None and (isinstance(assignment_seed, bool) or not isinstance(assignment_seed, int)):
        raise ValueError("assignment_seed must be a whole number")
    if (assignment_seed is None) != (assignment_method is None):
        raise ValueError("assignment method and seed are recorded together")
    if corrects is not None and (isinstance(corrects, bool) or not isinstance(corrects, int) or corrects < 1):
        raise ValueError("corrects must be the seq of an earlier entry")
    if (figures is None) != (verdict is None):
        raise ValueError("figures and verdict are recorded together")
    if figures is not None and figures.animal != animal:
        raise ValueError(f"the figures are for {figures.animal!r}, not {animal!r}")
    disagrees = verdict is not None and not rule_agrees(decision, group, verdict)
    return Decision(decision, animal, operator, reason, time, None if blinded else group, group_code,
                    planned_manipulation, planned_date, assignment_method, assignment_seed,
                    None if figures is None else Snapshot.of(figures, verdict),
                    None if verdict is None else verdict.state, disagrees, corrects)


@dataclass(frozen=True, slots=True)
class LogEntry:
    """One chained entry; `seq` (from 1) is its id."""

    seq: int
    prev_hash: str
    algorithm: str
    decision: Decision
    hash: str = field(default="")

    def content(self) -> dict[str, Any]:
        """Everything the hash covers."""
        d = self.decision
        return {
            "format": FORMAT, "seq": self.seq, "prev_hash": self.prev_hash, "algorithm": self.algorithm,
            "decision": d.decision, "animal": d.animal, "operator": d.operator, "reason": d.reason,
            "time": d.time, "group": d.group, "group_code": d.group_code,
            "planned_manipulation": d.planned_manipulation, "planned_date": d.planned_date,
            "assignment_method": d.assignment_method, "assignment_seed": d.assignment_seed,
            "snapshot": None if d.snapshot is None else d.snapshot.data(),
            "rule_state": d.rule_state, "disagrees_with_rule": d.disagrees_with_rule, "corrects": d.corrects,
        }

    def payload(self) -> str:
        """Canonical text of the content (what the store should keep beside the hash)."""
        return canonical_json(self.content())

    def csv_row(self) -> dict[str, Any]:
        """A flat row for the CSV export (columns: DECISION_CSV_COLUMNS); figures from the snapshot."""
        c = self.content()
        figures = (c.pop("snapshot") or {}).get("figures", {})
        row = {k: c[k] for k in DECISION_CSV_COLUMNS if k in c}
        for key in ("plateau_session", "sessions_since_plateau", "trials_since_plateau", "slow_estimate",
                    "slow_low", "slow_high", "slow_status", "protocol_version"):
            row[key] = figures.get(key)
        row["measures"] = canonical_json(figures.get("measures", {}))
        row["hash"] = self.hash
        return {k: "" if row.get(k) is None else row[k] for k in DECISION_CSV_COLUMNS}

    @classmethod
    def from_content(cls, c: Mapping[str, Any], hash: str) -> "LogEntry":
        """Rebuild an entry from its fields (e.g. a store row, `snapshot` parsed or as text); no checking."""
        raw = c.get("snapshot")
        if isinstance(raw, str):
            raw = json.loads(raw)
        snapshot = None if raw is None else Snapshot(canonical_json(raw))
        decision = Decision(c["decision"], c["animal"], c["operator"], c["reason"], c["time"], c.get("group"),
                            c.get("group_code"), c.get("planned_manipulation"), c.get("planned_date"),
                            c.get("assignment_method"), c.get("assignment_seed"), snapshot, c.get("rule_state"),
                            bool(c.get("disagrees_with_rule")), c.get("corrects"))
        return cls(c["seq"], c["prev_hash"], c["algorithm"], decision, hash)

    @classmethod
    def from_payload(cls, payload: str, hash: str) -> "LogEntry":
        """Rebuild an entry from its stored canonical payload and hash (no checking: use verify_chain)."""
        return cls.from_content(json.loads(payload), hash)


def digest(payload: str, key: bytes | None) -> str:
    """Hex SHA-256 of the payload, or HMAC-SHA256 under `key`."""
    data = payload.encode("utf-8")
    if key is None:
        return hashlib.sha256(data).hexdigest()
    return hmac.new(key, data, hashlib.sha256).hexdigest()


def append(previous: LogEntry | None, decision: Decision, key: bytes | None = None,
           corrected: LogEntry | None = None) -> LogEntry:
    """The next entry after `previous` (None for the first), hashed (keyed when `key` is given).

    A correction must be given the entry it corrects (same animal, earlier seq).
    """
    if decision.corrects is not None:
        if corrected is None or corrected.seq != decision.corrects:
            raise ValueError(f"entry {decision.corrects} to correct was not given")
        if corrected.decision.animal != decision.animal:
            raise ValueError(f"entry {corrected.seq} is about {corrected.decision.animal!r}, "
                             f"not {decision.animal!r}")
    seq = 1 if previous is None else previous.seq + 1
    entry = LogEntry(seq, GENESIS if previous is None else previous.hash, KEYED if key else PLAIN, decision)
    return LogEntry(entry.seq, entry.prev_hash, entry.algorithm, decision, digest(entry.payload(), key))


@dataclass(frozen=True, slots=True)
class Head:
    """A chain head to export and keep elsewhere (catches truncation and rewrites)."""

    seq: int
    hash: str


def head(entries: Sequence[LogEntry]) -> Head | None:
    return Head(entries[-1].seq, entries[-1].hash) if entries else None


@dataclass(frozen=True, slots=True)
class ChainCheck:
    """Result of verify_chain: ok, or the first broken entry and why."""

    ok: bool
    checked: int
    index: int | None = None  # position in the list given
    seq: int | None = None
    kind: str | None = None  # order | gap | link | algorithm | hash | field | corrects | head | unreadable
    message: str = ""


def _field_diff(recorded: dict[str, Any], now: dict[str, Any]) -> str:
    changed = sorted(k for k in set(recorded) | set(now) if recorded.get(k) != now.get(k))
    name = changed[0]
    return f"field {name!r} was edited (recorded {recorded.get(name)!r}, now {now.get(name)!r})"


def verify_chain(entries: Sequence[LogEntry], key: bytes | None = None, heads: Sequence[Head] = (),
                 payloads: Sequence[str] | None = None) -> ChainCheck:
    """Check order, links, hashes, corrections and exported heads; stop at the first problem.

    With `key`, every entry must be keyed (a rewrite with the public algorithm
    fails). `payloads`, the canonical texts kept at write time, let an edited
    field be named.
    """
    seqs = [e.seq for e in entries]
    animals: dict[int, str] = {}
    for index, entry in enumerate(entries):
        seq = entry.seq

        def broken(kind: str, message: str) -> ChainCheck:
            return ChainCheck(False, index, index, seq, kind, f"entry {seq} (position {index + 1}): {message}")

        expected = index + 1
        if seq != expected:
            if expected in seqs[index + 1:]:
                return broken("order", f"out of order: entry {expected} comes after it (entries were reordered)")
            if isinstance(seq, int) and seq > expected:
                missing = f"entry {expected}" if seq == expected + 1 else f"entries {expected}–{seq - 1}"
                return broken("gap", f"{missing} missing (deleted)")
            return broken("order", f"expected entry {expected} here (duplicate or moved entry)")
        previous = GENESIS if index == 0 else entries[index - 1].hash
        if entry.prev_hash != previous:
            return broken("link", "does not chain to the entry before it (an entry was removed, replaced or forged)")
        if key is not None and entry.algorithm != KEYED:
            return broken("algorithm", f"is hashed with {entry.algorithm!r}, not the keyed {KEYED!r} "
                                       "(rewritten without the key)")
        if key is None and entry.algorithm != PLAIN:
            return broken("algorithm", "is keyed: verify with the database's key")
        try:
            payload = entry.payload()
        except (TypeError, ValueError) as exc:
            return broken("unreadable", f"content cannot be written canonically ({exc})")
        if not hmac.compare_digest(digest(payload, key), entry.hash):
            if payloads is not None and index < len(payloads) and payloads[index] != payload \
                    and hmac.compare_digest(digest(payloads[index], key), entry.hash):
                return broken("field", _field_diff(json.loads(payloads[index]), json.loads(payload)))
            what = ("keyed hash (edited or forged without the key)" if key
                    else "hash (edited, or forged outside the program)")
            return broken("hash", f"content does not match its {what}")
        corrects = entry.decision.corrects
        if corrects is not None and animals.get(corrects) != entry.decision.animal:
            return broken("corrects", f"corrects entry {corrects}, which is not an earlier entry about "
                                      f"{entry.decision.animal!r}")
        animals[seq] = entry.decision.animal
    by_seq = {e.seq: e for e in entries}
    for mark in heads:
        found = by_seq.get(mark.seq)
        if found is None:
            return ChainCheck(False, len(entries), None, mark.seq, "head",
                              f"an exported head names entry {mark.seq}, but the log ends at "
                              f"{entries[-1].seq if entries else 0} (entries deleted from the end)")
        if not hmac.compare_digest(found.hash, mark.hash):
            return ChainCheck(False, len(entries), mark.seq - 1, mark.seq, "head",
                              f"entry {mark.seq} no longer has the exported head hash (the log was rewritten)")
    return ChainCheck(True, len(entries), message=f"{len(entries)} {'entry' if len(entries) == 1 else 'entries'}, chain intact")
