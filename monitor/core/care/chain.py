"""The care log's hash chain: each entry's hash covers its content and the previous entry's hash.

Rule: an entry's content (a mapping of plain values: text, integers, finite
floats, None) is written as canonical JSON (sorted keys, no spaces, UTF-8,
floats in Python's shortest round-trip form) together with the previous
entry's hash, and hashed with SHA-256; the first entry chains to 64 zeros.
Entries are only added: a void or a correction is a new entry naming the one
it replaces. `verify_care_chain` rebuilds every hash from the stored content
in insertion order and names the first entry that does not match (changed,
removed or inserted). Pure.
"""

from __future__ import annotations

import hashlib
import json
import math
from typing import Any, Mapping, NamedTuple, Sequence

GENESIS = "0" * 64
FORMAT = "rigside-care 1"


def _plain(value: Any) -> Any:
    if isinstance(value, float):
        if not math.isfinite(value):
            raise ValueError(f"non-finite number {value!r} cannot be logged")
        return 0.0 if value == 0 else value
    if value is None or isinstance(value, (str, int)):
        return value
    raise TypeError(f"{type(value).__name__} cannot be logged")


def care_hash(prev_hash: str, content: Mapping[str, Any]) -> str:
    """SHA-256 of the canonical JSON of `content` with the format and the previous hash."""
    body = {"format": FORMAT, "prev_hash": prev_hash, **{k: _plain(v) for k, v in content.items()}}
    text = json.dumps(body, sort_keys=True, separators=(",", ":"), ensure_ascii=False, allow_nan=False)
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


class CareChainCheck(NamedTuple):
    ok: bool
    entries: int
    message: str
    entry: int | None = None   # the id of the first broken entry (None: intact)


def verify_care_chain(rows: Sequence[tuple[int, Mapping[str, Any], str | None, str | None]]) -> CareChainCheck:
    """Check rows (id, content, prev_hash, hash) in insertion order; name the first broken one."""
    previous = GENESIS
    for number, (entry_id, content, prev_hash, digest) in enumerate(rows, start=1):
        if prev_hash != previous:
            return CareChainCheck(False, number - 1, f"care entry {entry_id}: does not follow the entry before it "
                                                     "(an entry was removed or inserted)", entry_id)
        if digest != care_hash(previous, content):
            return CareChainCheck(False, number - 1, f"care entry {entry_id}: its content was changed after it "
                                                     "was recorded (hash does not match)", entry_id)
        previous = digest
    return CareChainCheck(True, len(rows), f"{len(rows)} care entries, chain intact")
