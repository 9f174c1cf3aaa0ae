"""Blinding keys: one secret per blinded cohort, in a key file beside the database, never in it.

Rule: the secret behind a cohort's group codes (monitor.core.eligibility.assignment
`blinding_key`) is drawn once with `new_secret` the first time the cohort is
judged, and written to `DB.blinding/COHORT-HASH.json` (folder 0700, file
0600, created atomically: a second process reads the first one's file; on
file systems without hard links, such as FAT or some network shares, it is
created exclusively instead). On Windows the modes do nothing: the file
takes the folder's access rights, so keep the database in the user's own
folders (the default) or a share only the blind holders can read. It is
kept out of the database so that a copied database, `rigside log export`, the
report and the NWB files carry codes only. The file also holds the group
names the codes were made for; a rule whose groups differ is refused, since a
key is never changed. Only `rigside assign --reveal-key` shows the
group <-> code table, to whoever holds the blind.
"""

from __future__ import annotations

import hashlib
import json
import os
import re
from datetime import datetime
from pathlib import Path
from typing import Sequence

from monitor.core.eligibility.assignment import BlindingKey, blinding_key, new_secret
from monitor.store.connection import Connection, database_path  # noqa: F401 - named here for its callers

KEY_FORMAT = "rigside blinding key 1"


class BlindingError(ValueError):
    """A blinding key that cannot be read, made, or does not fit the rule."""


def keys_folder(db: Path) -> Path:
    return db.with_name(db.name + ".blinding")


def key_file(db: Path, cohort: str) -> Path:
    """Where the cohort's key lives (a readable slug and a hash of the exact name)."""
    slug = re.sub(r"[^A-Za-z0-9_-]+", "-", cohort).strip("-")[:40] or "cohort"
    return keys_folder(db) / f"{slug}-{hashlib.sha256(cohort.encode('utf-8')).hexdigest()[:8]}.json"


def read_key(path: Path) -> tuple[str, tuple[str, ...], BlindingKey]:
    """(cohort, groups, key) from a key file; BlindingError names the file."""
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
        if data.get("format") != KEY_FORMAT:
            raise ValueError(f"not a {KEY_FORMAT!r} file")
        groups = tuple(data["groups"])
        return data["cohort"], groups, blinding_key(groups, bytes.fromhex(data["secret"]))
    except OSError as exc:
        raise BlindingError(f"cannot read the blinding key {path} ({exc.strerror or exc})") from None
    except (ValueError, KeyError, TypeError) as exc:
        raise BlindingError(f"the blinding key {path} is damaged ({exc})") from None


def cohort_key(db: Path, cohort: str, groups: Sequence[str]) -> BlindingKey:
    """The cohort's key, made once (new secret) when there is none yet; BlindingError otherwise."""
    path = key_file(db, cohort)
    if not path.exists():
        _create(path, cohort, tuple(groups))
    stored_cohort, stored_groups, key = read_key(path)
    if stored_cohort != cohort or set(stored_groups) != set(groups):
        raise BlindingError(f"the blinding key {path} was made for groups {', '.join(stored_groups)} of cohort "
                            f"{stored_cohort!r}; the rule now names {', '.join(groups)} (a key is never changed: "
                            "use a new cohort name)")
    return key


def _create(path: Path, cohort: str, groups: tuple[str, ...]) -> None:
    blinding_key(groups, b"\0" * 16)          # refuse bad group lists before drawing a secret
    text = json.dumps({"format": KEY_FORMAT, "cohort": cohort, "groups": list(groups),
                       "secret": new_secret().hex(),
                       "created": datetime.now().astimezone().isoformat(timespec="seconds")}, indent=1)
    try:
        path.parent.mkdir(mode=0o700, parents=True, exist_ok=True)
        draft = path.with_name(f".{path.name}.{os.getpid()}")
        fd = os.open(draft, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o600)
        with os.fdopen(fd, "w", encoding="utf-8") as out:
            out.write(text)
            out.flush()
            os.fsync(out.fileno())
        try:
            os.link(draft, path)              # atomic, and refuses when another process made it first
        except FileExistsError:
            pass
        except OSError:                       # no hard links (FAT, exFAT, some network shares)
            _create_exclusively(path, text)
        finally:
            draft.unlink()
    except OSError as exc:
        raise BlindingError(f"cannot write the blinding key {path} ({exc.strerror or exc})") from None


def _create_exclusively(path: Path, text: str) -> None:
    """Write `path` only if nobody has (O_EXCL); a reader racing the write may see it short."""
    try:
        fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
    except FileExistsError:
        return
    with os.fdopen(fd, "w", encoding="utf-8") as out:
        out.write(text)
        out.flush()
        os.fsync(out.fileno())
