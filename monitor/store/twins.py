"""Files written whole: first under a temporary twin of the writer's own, then renamed into place.

Rule: the twin sits in the target's folder (the rename then replaces the target
in one step, on one file system), is hidden (a dot, then the target's name) and
is unique to the writer (`tempfile.mkstemp`): two processes that write the same
name at once (the window's export and a command's, two backups) each fill their
own twin, and the name ends up holding one of the two whole files, never a mix
or a file cut short by the other's clean-up. A writer killed before its rename
(SIGKILL, a power cut) leaves its twin behind; the next writer of that name
removes the twins nobody has written for `STALE_TWIN_S` (a writer touches its
twin as it goes, so a twin that old has no writer left).
"""

from __future__ import annotations

import glob
import os
import tempfile
import time
from pathlib import Path

STALE_TWIN_S = 24 * 3600.0
RANDOM_LEN = 8  # the characters mkstemp puts between prefix and suffix (so another name's twins never match)


def twin(path: Path, suffix: str = ".part") -> Path:
    """A new, empty file beside `path` that nobody else writes: `.NAME.RANDOM.part` (stale twins of `path`
    removed first)."""
    _remove_stale_twins(path, suffix)
    handle, name = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=suffix)
    os.close(handle)
    return Path(name)


def _remove_stale_twins(path: Path, suffix: str) -> None:
    """Remove the twins of `path` last written `STALE_TWIN_S` or more ago (their writers were killed)."""
    cutoff = time.time() - STALE_TWIN_S
    for candidate in path.parent.glob(f".{glob.escape(path.name)}.{'?' * RANDOM_LEN}{suffix}"):
        try:
            if candidate.stat().st_mtime <= cutoff:
                candidate.unlink()
        except OSError:  # gone meanwhile, or not ours to remove: left alone
            continue
