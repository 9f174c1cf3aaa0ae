"""Worker processes end with the process that started them.

Rule: every process the store starts for work (import parsing, fits, NWB files)
calls `end_with_parent` first. A daemon thread then waits on the parent's
sentinel (`multiprocessing.parent_process()`: a pipe on POSIX, the process handle
on Windows) and ends this process at once when the parent is gone, killed or
crashed: nobody is left to take its results, and an orphan would hold a core
beside the next recording until it finished (a cohort's fits: minutes). Work
stopped this way leaves nothing half-written: the store's transactions roll
back, and files are written under a temporary name first.
"""

from __future__ import annotations

import multiprocessing
import os
import threading

PARENT_GONE_EXIT = 3  # the exit status of a worker whose parent is gone (nobody reads it)


def end_with_parent() -> None:
    """In a worker process: end this process as soon as its parent ends (nothing happens in a main process)."""
    parent = multiprocessing.parent_process()
    if parent is None:
        return

    def watch() -> None:
        parent.join()
        os._exit(PARENT_GONE_EXIT)

    threading.Thread(target=watch, name="ends with its parent", daemon=True).start()
