"""Random assignment of eligible animals to groups, and blinding codes.

Rule: assignment never looks at an animal's figures (grouping by an estimate
would confound the groups with learning speed). Both methods are defined by
SHA-256 alone, so anyone can redo them from the recorded seed and method name
with any SHA-256 tool, whatever Python or numpy version: the rank of a text
`t` under seed `s` is the hex digest of SHA-256 over the UTF-8 bytes of
`"{s}:{t}"`.
- `cohort-sha256-v1` (`assign_cohort`): animals sorted by rank of their name,
  groups sorted by rank of `group:NAME`, then dealt round-robin: sizes differ
  by at most one, and the result does not depend on the order animals were
  listed in.
- `blocks-sha256-v1` (`block_sequence`): for animals that become eligible one
  at a time, permuted blocks: block b holds each group `per_block` times, in
  the order of rank of `block:b:GROUP:i`; the k-th animal assigned gets entry
  k, so groups are balanced at the end of every block.
Blinding: each group gets a code such as "G-7Q" from an HMAC-SHA256 of the
group name under a secret that is kept apart from the seed (the seed is in the
decision log that operators read; the code key is not), so codes cannot be
recomputed from the log. `new_seed()` and `new_secret()` draw from the OS.
"""

from __future__ import annotations

import hashlib
import hmac
import secrets
from dataclasses import dataclass
from types import MappingProxyType
from typing import Mapping, Sequence

COHORT_METHOD = "cohort-sha256-v1"
BLOCKS_METHOD = "blocks-sha256-v1"
CODE_ALPHABET = "23456789ABCDEFGHJKLMNPQRSTUVWXYZ"  # no 0/O, 1/I: read aloud and written by hand


def rank(seed: int, text: str) -> str:
    """The sort key of `text` under `seed` (hex SHA-256 of "seed:text")."""
    return hashlib.sha256(f"{seed}:{text}".encode("utf-8")).hexdigest()


def new_seed() -> int:
    """A fresh 63-bit seed from the operating system's random source."""
    return secrets.randbits(63)


def new_secret() -> bytes:
    """A fresh 32-byte secret (blinding key, log key)."""
    return secrets.token_bytes(32)


@dataclass(frozen=True, slots=True)
class Assignment:
    """Who went where, and how to redo it."""

    method: str
    seed: int
    groups: tuple[str, ...]
    animals: Mapping[str, str]  # animal -> group (read-only)


def _check(groups: Sequence[str]) -> tuple[str, ...]:
    names = tuple(groups)
    if not names:
        raise ValueError("no groups to assign to")
    if len(set(names)) != len(names):
        raise ValueError("group names repeat")
    return names


def assign_cohort(animals: Sequence[str], groups: Sequence[str], seed: int) -> Assignment:
    """Balanced random assignment of a whole set of eligible animals (method cohort-sha256-v1)."""
    names = _check(groups)
    if len(set(animals)) != len(animals):
        raise ValueError("animal names repeat")
    order = sorted(animals, key=lambda a: rank(seed, a))
    slots = sorted(names, key=lambda g: rank(seed, f"group:{g}"))
    result = {animal: slots[i % len(slots)] for i, animal in enumerate(order)}
    return Assignment(COHORT_METHOD, seed, names, MappingProxyType(result))


def block_sequence(groups: Sequence[str], seed: int, count: int, per_block: int = 1) -> tuple[str, ...]:
    """The first `count` assignments of a permuted-block list (method blocks-sha256-v1)."""
    names = _check(groups)
    if per_block < 1:
        raise ValueError("per_block must be >= 1")
    sequence: list[str] = []
    block = 0
    while len(sequence) < count:
        entries = [(g, i) for g in names for i in range(per_block)]
        entries.sort(key=lambda e: rank(seed, f"block:{block}:{e[0]}:{e[1]}"))
        sequence += [g for g, _ in entries]
        block += 1
    return tuple(sequence[:count])


def assign_next(already_assigned: int, groups: Sequence[str], seed: int, per_block: int = 1) -> str:
    """The group for the next animal when `already_assigned` animals went before it."""
    return block_sequence(groups, seed, already_assigned + 1, per_block)[-1]


@dataclass(frozen=True, slots=True)
class BlindingKey:
    """Group <-> code. Keep it away from operators; the log holds only codes."""

    codes: Mapping[str, str]  # group -> code (read-only)

    def code_of(self, group: str) -> str:
        return self.codes[group]

    def group_of(self, code: str) -> str:
        for group, known in self.codes.items():
            if known == code:
                return group
        raise KeyError(code)


def _code(secret: bytes, text: str) -> str:
    digest = hmac.new(secret, text.encode("utf-8"), hashlib.sha256).digest()
    return "G-" + CODE_ALPHABET[digest[0] % 32] + CODE_ALPHABET[digest[1] % 32]


def blinding_key(groups: Sequence[str], secret: bytes) -> BlindingKey:
    """Distinct codes like "G-7Q" for the groups, derived from a secret (same secret, same codes)."""
    names = _check(groups)
    if len(secret) < 16:
        raise ValueError("the blinding secret must be at least 16 bytes")
    codes: dict[str, str] = {}
    for group in names:
        attempt = 0
        code = _code(secret, group)
        while code in codes.values():  # 1024 codes: a clash is rare; retry deterministically
            attempt += 1
            code = _code(secret, f"{group}#{attempt}")
        codes[group] = code
    return BlindingKey(MappingProxyType(codes))
