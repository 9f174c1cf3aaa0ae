"""The manipulation log: validation, the SHA-256 chain (checked with hashlib), withdrawals."""

from __future__ import annotations

import hashlib
import json
from dataclasses import replace

import pytest

from monitor.core.effects.manipulation_log import (GENESIS, ManipulationEntry, append, first_broken, in_force,
                                           new_manipulation)

STAGE = {"session": 9, "slow_estimate": 0.61, "slow_low": 0.4, "slow_high": 0.8, "slow_status": "estimated",
         "sessions_since_plateau": 4, "trials_since_plateau": 1800}


def _m(**changes):
    fields = dict(animal="alder", duration="acute", role="test", what="muscimol M1", session_id=12,
                  operator="kim", reason="planned", time="2026-03-02T10:00:00+01:00", stage=STAGE)
    fields.update(changes)
    return new_manipulation(**fields)


def test_entries_chain_with_sha256_of_their_canonical_payload():
    first = append(None, _m())
    second = append(first, _m(role="control", what="saline", session_id=14))
    assert first.prev_hash == GENESIS and second.prev_hash == first.hash
    # the hash is plain SHA-256 of the canonical payload (Python's hashlib, FIPS 180-4)
    assert second.hash == hashlib.sha256(second.payload().encode("utf-8")).hexdigest()
    assert json.loads(first.payload())["stage"]["slow_estimate"] == 0.61
    assert first_broken([first, second]) is None
    edited = ManipulationEntry(first.seq, first.prev_hash, replace(first.manipulation, what="saline"), first.hash)
    assert "entry 1" in first_broken([edited, second])
    assert "expected entry 1" in first_broken([second])


def test_withdrawal_appends_and_leaves_the_rest_in_force():
    first = append(None, _m())
    second = append(first, _m(what="lesion", duration="lasting", session_id=20))
    third = append(second, _m(withdraws=1, reason="wrong animal"), withdrawn=first)
    assert [e.seq for e in in_force([first, second, third])] == [2]
    with pytest.raises(ValueError, match="no entry 5"):
        append(third, _m(withdraws=5), withdrawn=None)
    with pytest.raises(ValueError, match="about 'alder'"):
        append(third, _m(animal="birch", withdraws=1), withdrawn=first)


@pytest.mark.parametrize("changes, words", [
    ({"duration": "forever"}, "duration"), ({"role": "sham"}, "role"), ({"what": " "}, "what"),
    ({"operator": ""}, "operator"), ({"time": "2026-03-02 10:00"}, "time"),
    ({"duration": "lasting", "control_session_id": 11}, "control session"),
    ({"role": "control", "control_session_id": 11}, "control session"),
    ({"control_session_id": 12}, "another session"), ({"stage": {"mood": 1}}, "stage"),
    ({"withdraws": 0}, "withdraws")])
def test_bad_fields_are_named(changes, words):
    with pytest.raises(ValueError, match=words):
        _m(**changes)
