"""Random assignment: reproducible from the recorded seed, balanced, unbiased; blinding codes."""

from __future__ import annotations

import hashlib
import random
import re
from collections import Counter

import pytest
from scipy.stats import chisquare

from monitor.core.eligibility.assignment import (BLOCKS_METHOD, COHORT_METHOD, assign_cohort, assign_next, block_sequence,
                                     blinding_key, new_seed)

ANIMALS = [f"rat{n:02d}" for n in range(1, 12)]
GROUPS = ["early", "late", "sham"]


def test_assignment_reproduces_from_its_recorded_seed():
    seed = new_seed()
    first = assign_cohort(ANIMALS, GROUPS, seed)
    recorded = (first.method, first.seed)
    assert recorded == (COHORT_METHOD, seed)
    again = assign_cohort(list(reversed(ANIMALS)), GROUPS, recorded[1])  # listing order does not matter
    assert dict(again.animals) == dict(first.animals)


def test_cohort_method_matches_its_written_definition():
    # Independent re-implementation of docs/eligibility.md's definition with hashlib only.
    seed = 20260302
    h = lambda text: hashlib.sha256(f"{seed}:{text}".encode()).hexdigest()  # noqa: E731
    order = sorted(ANIMALS, key=h)
    slots = sorted(GROUPS, key=lambda g: h(f"group:{g}"))
    expected = {a: slots[i % 3] for i, a in enumerate(order)}
    assert dict(assign_cohort(ANIMALS, GROUPS, seed).animals) == expected


@pytest.mark.parametrize("count", [1, 2, 5, 11, 12])
def test_groups_are_balanced(count):
    sizes = Counter(assign_cohort(ANIMALS[:count] + [f"x{n}" for n in range(count - len(ANIMALS))],
                                  GROUPS, 7).animals.values())
    full = [sizes.get(g, 0) for g in GROUPS]
    assert max(full) - min(full) <= 1 and sum(full) == count


def test_no_animal_is_favoured_across_seeds():
    # Each animal should land in each group 1/3 of the time; chi-square goodness of fit (scipy.stats).
    counts = Counter(assign_cohort(ANIMALS, GROUPS, seed).animals["rat01"] for seed in range(3000))
    assert chisquare([counts[g] for g in GROUPS]).pvalue > 1e-3
    # and two animals share a group about as often as balanced dealing implies (11 animals, 3 groups:
    # sizes 4,4,3 -> P(same) = (4*3 + 4*3 + 3*2) / (11*10) = 30/110), checked against a plain shuffle
    same = sum(len({(a := assign_cohort(ANIMALS, GROUPS, s).animals)["rat01"], a["rat02"]}) == 1
               for s in range(3000))
    rng = random.Random(1)
    shuffled = 0
    for _ in range(3000):
        order = ANIMALS[:]
        rng.shuffle(order)
        dealt = {x: GROUPS[i % 3] for i, x in enumerate(order)}
        shuffled += dealt["rat01"] == dealt["rat02"]
    assert abs(same / 3000 - 30 / 110) < 0.03 and abs(shuffled / 3000 - 30 / 110) < 0.03


def test_permuted_blocks_balance_every_block():
    sequence = block_sequence(GROUPS, 99, 30, per_block=2)
    assert len(sequence) == 30
    for start in range(0, 30, 6):
        assert Counter(sequence[start:start + 6]) == {g: 2 for g in GROUPS}
    assert block_sequence(GROUPS, 99, 30, per_block=2) == sequence  # reproducible
    assert [assign_next(k, GROUPS, 99, per_block=2) for k in range(30)] == list(sequence)
    assert block_sequence(GROUPS, 100, 30, per_block=2) != sequence
    assert BLOCKS_METHOD == "blocks-sha256-v1"


def test_bad_inputs_are_refused():
    with pytest.raises(ValueError):
        assign_cohort(["a", "a"], GROUPS, 1)
    with pytest.raises(ValueError):
        assign_cohort(["a"], [], 1)
    with pytest.raises(ValueError):
        block_sequence(["g", "g"], 1, 3)


def test_blinding_codes_are_distinct_and_come_from_the_secret():
    secret = bytes(range(32))
    key = blinding_key(["muscimol", "saline"], secret)
    codes = list(key.codes.values())
    assert len(set(codes)) == 2 and all(re.fullmatch(r"G-[2-9A-HJ-NP-Z]{2}", c) for c in codes)
    assert blinding_key(["muscimol", "saline"], secret) == key
    assert key.group_of(key.code_of("saline")) == "saline"
    many = blinding_key([f"arm{n}" for n in range(200)], secret)
    assert len(set(many.codes.values())) == 200  # clashes are re-drawn
    others = [blinding_key(["muscimol", "saline"], bytes([n]) * 32).codes for n in range(5)]
    assert len({tuple(c.values()) for c in others}) > 1
    with pytest.raises(ValueError):
        blinding_key(["a"], b"short")
    with pytest.raises(KeyError):
        key.group_of("nope")
