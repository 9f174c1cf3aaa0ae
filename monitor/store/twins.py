"""Files written whole: first under a temporary twin of the writer's own, then renamed into place.

Rule: the twin sits in the target's folder (the rename then replaces the target
in one step, on one file system), is hidden (a dot, then the target's name) and
is unique to the writer (`tempfile.mkstemp`): two processes that write the same
name at once (the window's export and a command's, two backups) each fill their
own twin, and the name ends up holding one of the two whole files, never a mix
or a file cut short by the other's clean-up.
"""

from __future__ import annotations

import os
import tempfile
from pathlib import Path


def twin(path: Path, suffix: str = ".part") -> Path:
    """A new, empty file beside `path` that nobody else writes: `.NAME.RANDOM.part`."""
    handle, name = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=suffix)
    os.close(handle)
    return Path(name)
