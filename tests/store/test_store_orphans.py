"""A worker process ends when the process that started it is killed (monitor.store.orphans).

The parent is a real process killed with SIGKILL (no handler, no clean-up can run), as when the window or a
command is ended by the OS or a task manager; the worker must not live on without it.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time

import pytest

posix_only = pytest.mark.skipif(sys.platform == "win32", reason="kills with SIGKILL and probes with signal 0")

PARENT = """
import multiprocessing, sys, time

def work(watch):
    if watch:
        from monitor.store.orphans import end_with_parent
        end_with_parent()
    time.sleep(120)

if __name__ == "__main__":
    child = multiprocessing.get_context("spawn").Process(target=work, args=(sys.argv[1] == "watch",))
    child.start()
    print(child.pid, flush=True)
    time.sleep(120)
"""


def alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)   # signal 0 only asks whether the process exists (POSIX kill(2); common practice)
    except ProcessLookupError:
        return False
    return True


def gone_within(pid: int, seconds: float) -> bool:
    deadline = time.monotonic() + seconds
    while time.monotonic() < deadline:
        if not alive(pid):
            return True
        time.sleep(0.05)
    return False


def parent_and_child(tmp_path, mode: str) -> tuple[subprocess.Popen, int]:
    script = tmp_path / "parent.py"
    script.write_text(PARENT, encoding="utf-8")
    parent = subprocess.Popen([sys.executable, str(script), mode], stdout=subprocess.PIPE, text=True,
                              cwd=os.getcwd(), env={**os.environ, "PYTHONPATH": os.pathsep.join(sys.path)})
    return parent, int(parent.stdout.readline())


@posix_only
def test_a_worker_ends_when_its_parent_is_killed(tmp_path):
    parent, child = parent_and_child(tmp_path, "watch")
    time.sleep(0.5)  # the child's watch has started
    assert alive(child)
    parent.kill()
    parent.wait(timeout=10)
    assert gone_within(child, 10)


@posix_only
def test_without_the_watch_the_worker_would_outlive_its_parent(tmp_path):
    """The same parent without `end_with_parent`: the orphan lives on (what the watch prevents)."""
    parent, child = parent_and_child(tmp_path, "plain")
    try:
        parent.kill()
        parent.wait(timeout=10)
        assert not gone_within(child, 2)
    finally:
        if alive(child):
            os.kill(child, signal.SIGKILL)
