"""Decision log: hash chain tamper checks, keyed variant, frozen snapshots, disagreements."""

from __future__ import annotations

import dataclasses
import hashlib
import hmac
import json

import pytest

from drivers.config import TomlFile
from monitor.core.eligibility.decision_log import (DECISION_CSV_COLUMNS, GENESIS, Decision, Head, LogEntry, Snapshot, append,
                                       canonical_json, digest, head, new_decision, verify_chain)
from monitor.core.eligibility.rules import parse_eligibility
from monitor.core.eligibility.figures import AnimalFigures
from monitor.core.eligibility.verdict import evaluate

KEY = b"k" * 32
RULE = parse_eligibility(*(lambda d: (d.data["eligibility"], d))(TomlFile(
    "[eligibility.groups.early]\nmax_sessions_since_plateau = 4\nmax_cv = 0.25\nmax_slow_fraction = 0.5\n",
    "cohort.toml")))


def figures(animal: str = "heron", since: int | None = 1, cv: float = 0.2, measures=None) -> AnimalFigures:
    return AnimalFigures(animal, "two-press 650 ms", 3, session=12, plateau_reached=since is not None,
                         plateau_session=None if since is None else 12 - since, sessions_since_plateau=since,
                         trials_since_plateau=None if since is None else since * 250,
                         measures={"cv": cv} if measures is None else measures,
                         slow_estimate=0.3, slow_low=0.2, slow_high=0.4, slow_status="estimated")


def decision(n: int, animal: str = "heron", kind: str = "eligible", **extra) -> Decision:
    f = figures(animal)
    return new_decision(decision=kind, animal=animal, operator="ana", reason=f"reason {n}",
                        time=f"2026-03-{n:02d}T10:00:00+01:00", figures=f, verdict=evaluate(RULE, f), **extra)


def chain(count: int = 5, key: bytes | None = None) -> list[LogEntry]:
    entries: list[LogEntry] = []
    for n in range(1, count + 1):
        entries.append(append(entries[-1] if entries else None, decision(n, "heron" if n % 2 else "wren"), key))
    return entries


def edited(entry: LogEntry, **changes) -> LogEntry:
    return dataclasses.replace(entry, decision=dataclasses.replace(entry.decision, **changes))


def test_digest_is_standard_sha256_and_hmac():
    # FIPS 180-2 example: SHA-256("abc")
    assert digest("abc", None) == "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"
    # RFC 4231 test case 2 (from memory; also recomputed with the stdlib below)
    assert digest("what do ya want for nothing?", b"Jefe") == \
        "5bdcc146bf60754e6a042426089575c75a003f089d2739839dec58b964ec3843"
    assert digest("x", b"Jefe") == hmac.new(b"Jefe", b"x", hashlib.sha256).hexdigest()


def test_entry_hash_covers_canonical_content_and_previous_hash():
    entries = chain(2)
    first, second = entries
    assert first.prev_hash == GENESIS and second.prev_hash == first.hash
    content = second.content()
    # independent: the standard json module with the documented options, then hashlib
    text = json.dumps(content, sort_keys=True, separators=(",", ":"), ensure_ascii=False)
    assert second.hash == hashlib.sha256(text.encode("utf-8")).hexdigest()
    assert content["prev_hash"] == first.hash and content["seq"] == 2


def test_canonical_json_rules():
    assert canonical_json({"b": 1, "a": [0.1, -0.0, True, None, "é"]}) == '{"a":[0.1,0.0,true,null,"é"],"b":1}'
    with pytest.raises(ValueError):
        canonical_json({"x": float("nan")})
    with pytest.raises(TypeError):
        canonical_json({"x": object()})
    assert json.loads(canonical_json({"v": 0.1 + 0.2}))["v"] == 0.1 + 0.2  # shortest round-trip, exact


def test_intact_chain_verifies_plain_and_keyed():
    assert verify_chain(chain()).ok
    assert verify_chain(chain(key=KEY), key=KEY).ok
    assert verify_chain([]).ok


def test_edited_field_is_caught_and_named_with_payloads():
    entries = chain()
    payloads = [e.payload() for e in entries]
    entries[2] = edited(entries[2], reason="changed later")
    result = verify_chain(entries)
    assert not result.ok and result.seq == 3 and result.index == 2 and result.kind == "hash"
    named = verify_chain(entries, payloads=payloads)
    assert named.kind == "field" and "'reason'" in named.message and "changed later" in named.message


def test_edited_snapshot_figure_is_caught():
    entries = chain()
    data = entries[1].decision.snapshot.data()
    data["figures"]["measures"]["cv"] = 0.1
    entries[1] = edited(entries[1], snapshot=Snapshot(canonical_json(data)))
    assert verify_chain(entries).seq == 2


def test_deleted_entry_is_a_sequence_gap():
    entries = chain()
    del entries[2]
    result = verify_chain(entries)
    assert not result.ok and result.kind == "gap" and result.seq == 4 and "entry 3 missing" in result.message


def test_deleted_and_renumbered_entry_breaks_the_chain():
    entries = chain()
    del entries[2]
    entries[2:] = [dataclasses.replace(e, seq=e.seq - 1) for e in entries[2:]]
    result = verify_chain(entries)
    assert not result.ok and result.seq == 3 and result.kind == "link"


def test_swapped_entries_are_caught():
    entries = chain()
    entries[1], entries[2] = entries[2], entries[1]
    result = verify_chain(entries)
    assert not result.ok and result.kind == "order" and result.index == 1 and result.seq == 3


def test_forged_entry_appended_without_the_program():
    entries = chain()
    forged = LogEntry(6, entries[-1].hash, "sha256", decision(6), hash="f" * 64)
    result = verify_chain(entries + [forged])
    assert not result.ok and result.seq == 6 and result.kind == "hash"
    unlinked = LogEntry(6, "a" * 64, "sha256", decision(6), hash="f" * 64)
    assert verify_chain(entries + [unlinked]).kind == "link"


def test_public_algorithm_rewrite_passes_plain_but_not_keyed():
    honest = chain(key=KEY)
    # the forger edits entry 2 and recomputes every hash with the public algorithm
    rewritten: list[LogEntry] = []
    for entry in honest:
        d = dataclasses.replace(entry.decision, reason="rewritten") if entry.seq == 2 else entry.decision
        rewritten.append(append(rewritten[-1] if rewritten else None, d, None))
    assert verify_chain(rewritten).ok  # the documented limit of an unkeyed chain
    result = verify_chain(rewritten, key=KEY)
    assert not result.ok and result.seq == 1 and result.kind == "algorithm"
    # ... and a rewrite with a guessed key fails on the first entry's keyed hash
    guessed: list[LogEntry] = []
    for entry in honest:
        guessed.append(append(guessed[-1] if guessed else None, entry.decision, b"g" * 32))
    assert verify_chain(guessed, key=KEY).kind == "hash"


def test_truncation_is_caught_by_an_exported_head():
    entries = chain()
    mark = head(entries)
    assert mark == Head(5, entries[-1].hash)
    assert verify_chain(entries[:4]).ok  # deleting the newest entries leaves a valid shorter chain
    result = verify_chain(entries[:4], heads=[mark])
    assert not result.ok and result.kind == "head" and "ends at 4" in result.message
    rewritten = entries[:4] + [append(entries[3], decision(9), None)]
    assert verify_chain(rewritten, heads=[mark]).kind == "head"


def test_correction_is_a_new_entry_pointing_back():
    entries = chain(3)
    fix = decision(4, "heron", kind="excluded", corrects=1)
    with pytest.raises(ValueError, match="was not given"):
        append(entries[-1], fix)
    with pytest.raises(ValueError, match="about 'wren'"):
        append(entries[-1], decision(4, "heron", corrects=2), corrected=entries[1])
    entries.append(append(entries[-1], fix, corrected=entries[0]))
    assert entries[-1].decision.corrects == 1 and entries[0].decision.reason == "reason 1"
    assert verify_chain(entries).ok
    # a correction pointing at another animal's entry, written outside the program, is refused
    bad = LogEntry(4, entries[2].hash, "sha256", dataclasses.replace(fix, corrects=2))
    bad = dataclasses.replace(bad, hash=hashlib.sha256(bad.payload().encode("utf-8")).hexdigest())
    assert verify_chain(entries[:3] + [bad]).kind == "corrects"


def test_snapshot_is_a_deep_frozen_copy():
    measures = {"cv": 0.2}
    f = figures(measures=measures)
    d = new_decision(decision="eligible", animal="heron", operator="ana", reason="r",
                     time="2026-03-02T10:00:00+01:00", figures=f, verdict=evaluate(RULE, f))
    before = d.snapshot.text
    measures["cv"] = 0.9  # the caller's dict changes later
    d.snapshot.data()["figures"]["measures"]["cv"] = 0.7  # a reader edits its copy
    assert f.measures["cv"] == 0.2
    with pytest.raises(TypeError):
        f.measures["cv"] = 0.5  # read-only mapping
    with pytest.raises(dataclasses.FrozenInstanceError):
        d.snapshot.text = "{}"
    later = figures(since=3, cv=0.3)  # later sessions change the animal's figures
    assert later.measures["cv"] == 0.3
    assert d.snapshot.text == before
    assert d.snapshot.figures() == f
    assert d.snapshot.data()["verdict"]["state"] == "in window: early"


def test_disagreement_is_recorded_with_both():
    training = figures(since=None)
    verdict = evaluate(RULE, training)
    d = new_decision(decision="eligible", animal="heron", operator="ana", reason="looks ready to me",
                     time="2026-03-02T10:00:00+01:00", figures=training, verdict=verdict)
    assert d.disagrees_with_rule and d.rule_state == "training"
    assert d.snapshot.data()["verdict"]["kind"] == "training"
    agreeing = decision(2)
    assert not agreeing.disagrees_with_rule
    deferred = decision(3, kind="deferred")
    assert deferred.disagrees_with_rule  # the window is open and the person waits: kept, flagged


def test_blinded_assignment_records_only_the_code():
    # treatment arms are blinded; the timing window ("early") is visible by its nature
    d = decision(2, kind="assigned", group="muscimol", group_code="G-7Q", blinded=True,
                 assignment_method="cohort-sha256-v1", assignment_seed=12345)
    assert d.group is None and d.group_code == "G-7Q" and not d.disagrees_with_rule
    assert "muscimol" not in json.dumps({k: v for k, v in LogEntry(1, GENESIS, "sha256", d).content().items()
                                      })


@pytest.mark.parametrize("field, value, words", [
    ("time", "2026-03-02T10:00:00", "UTC offset"),
    ("time", "yesterday", "UTC offset"),
    ("decision", "approved", "one of"),
    ("operator", " ", "operator"),
    ("planned_date", "next week", "planned_date"),
])
def test_bad_decisions_are_refused(field, value, words):
    f = figures()
    values = dict(decision="eligible", animal="heron", operator="ana", reason="r",
                  time="2026-03-02T10:00:00+01:00", figures=f, verdict=evaluate(RULE, f))
    values[field] = value
    with pytest.raises(ValueError, match=words):
        new_decision(**values)


def test_payload_and_row_round_trip():
    entries = chain(3, key=KEY)
    rebuilt = [LogEntry.from_payload(e.payload(), e.hash) for e in entries]
    assert rebuilt == entries
    assert verify_chain(rebuilt, key=KEY).ok
    rows = [{**e.content(), "snapshot": json.dumps(e.content()["snapshot"], indent=1)} for e in entries]
    from_rows = [LogEntry.from_content(row, e.hash) for row, e in zip(rows, entries)]
    assert from_rows == entries  # a store row with the snapshot as (any) JSON text rebuilds the same entry
    rows[1]["operator"] = "mallory"
    edited_rows = [LogEntry.from_content(row, e.hash) for row, e in zip(rows, entries)]
    result = verify_chain(edited_rows, key=KEY, payloads=[e.payload() for e in entries])
    assert result.kind == "field" and "'operator'" in result.message and "mallory" in result.message


def test_csv_row_carries_the_decision_and_its_figures():
    entry = chain(1)[0]
    row = entry.csv_row()
    assert tuple(row) == DECISION_CSV_COLUMNS
    assert (row["seq"], row["animal"], row["reason"], row["rule_state"]) == (1, "heron", "reason 1", "in window: early")
    assert (row["sessions_since_plateau"], row["slow_low"], row["slow_status"]) == (1, 0.2, "estimated")
    assert json.loads(row["measures"]) == {"cv": 0.2} and row["hash"] == entry.hash and row["corrects"] == ""
