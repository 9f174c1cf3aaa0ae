"""The refit after a new session starts from the fit the store cached after the session before.

A simulated animal (mock_rig's demo animal that plateaus) is imported without
fits; its first fit is a fresh search. Then one more session is imported and
the animal refitted, as at a check-out: that fit must come from the cached
optima (fewer likelihood evaluations), reach at least the likelihood a fresh
search reaches on the same data, and be saved as current.
"""

from __future__ import annotations

import os
import signal
import sqlite3
import subprocess
import sys

import pytest

from mock_rig.demo import STAGES, prepare_demo
from monitor.app.cli import main
from monitor.core.consolidation.analysis import estimate_consolidation
from monitor.store.consolidation_fits import refit_animal, store_series
from monitor.store.fits import cached_block, latest_fit

pytestmark = pytest.mark.slow  # windows, subprocesses or simulated histories: seconds per test


@pytest.fixture(scope="module")
def animal(tmp_path_factory):
    folder = tmp_path_factory.mktemp("cohort")
    stages = (STAGES[0][:2] + (1,), STAGES[1][:2] + (1,), STAGES[2])  # the third animal as in the demo
    return next(d for d in prepare_demo(folder / "history", stages=stages) if d.animal.name == STAGES[2][1]), folder


def import_sessions(db, animal, files) -> None:
    assert main(["import", *map(str, files), "--protocol", str(animal.protocol_path), "--db", str(db),
                 "--no-fit"]) == 0


def test_the_refit_after_a_new_session_starts_from_the_cached_fit(animal, capsys):
    demo, folder = animal
    db = folder / "store.sqlite3"
    import_sessions(db, demo, demo.session_files[:-1])
    first = refit_animal(db, demo.animal.name)
    with sqlite3.connect(db) as conn:
        cold = latest_fit(conn, demo.animal.name)["params"]
    assert first["status"] != "too few trials" and cold["from_cache"] is False

    import_sessions(db, demo, demo.session_files[-1:])  # the next session, as at a check-out
    block = refit_animal(db, demo.animal.name)
    with sqlite3.connect(db) as conn:
        warm = latest_fit(conn, demo.animal.name)["params"]
        assert cached_block(conn, demo.animal.name, None)["current"]
        series, last, _ = store_series(conn, demo.animal.name)
    assert warm["from_cache"] is True and warm["evaluations"] < cold["evaluations"]
    assert block["session"] == last == len(demo.session_files)
    fresh = estimate_consolidation(series)  # a fresh search on the same data, for comparison
    assert block["comparison"]["two_rate_loglike"] >= fresh.two_rate.loglike - 0.5



def test_a_cohort_is_fitted_by_one_process_per_core_and_each_fit_is_saved(tmp_path):
    from monitor.store.consolidation_fits import refit_in_process, worker_count

    assert worker_count(8, 2) == 2 and worker_count(1, 4) == 1 and worker_count(3) >= 1
    cohort = prepare_demo(tmp_path / "history", stages=(STAGES[1][:2] + (6,), STAGES[2][:2] + (6,)))
    db = tmp_path / "cohort.sqlite3"
    for demo in cohort:
        import_sessions(db, demo, demo.session_files)
    names = [demo.animal.name for demo in cohort]
    done: list[str] = []
    results = refit_in_process(db, names, finished=lambda a, b, e: done.append(a), workers=2)
    assert sorted(done) == sorted(names)
    with sqlite3.connect(db) as conn:
        for name in names:
            assert results[name] is not None
            assert latest_fit(conn, name)["block"]["status"] == results[name]["status"]
            assert cached_block(conn, name, None)["current"]


PARENT_OF_FITS = """
import signal, sys
from monitor.store.consolidation_fits import refit_in_process
asked = []
signal.signal(signal.SIGINT, lambda *_: asked.append(1))   # the parent decides what Ctrl-C means: stop the fits
started = []
def progress(animal, fraction, message):
    if not started:
        started.append(1)
        print("fitting", flush=True)
results = refit_in_process(sys.argv[1], sys.argv[2:], progress=progress, cancel=lambda: bool(asked), workers=2)
print("stopped" if asked else "finished", sum(r is not None for r in results.values()), flush=True)
"""


@pytest.mark.skipif(not hasattr(os, "killpg"), reason="sends a POSIX SIGINT to a process group, as a terminal does")
def test_a_terminals_ctrl_c_reaches_the_fits_processes_and_they_leave_it_to_their_parent(tmp_path):
    cohort = prepare_demo(tmp_path / "history", stages=(STAGES[1][:2] + (6,), STAGES[2][:2] + (6,)))
    db = tmp_path / "cohort.sqlite3"
    for demo in cohort:
        import_sessions(db, demo, demo.session_files)
    # a process group of its own, as a terminal starts a command: Ctrl-C goes to every process in it
    parent = subprocess.Popen([sys.executable, "-c", PARENT_OF_FITS, str(db), *[d.animal.name for d in cohort]],
                              stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, start_new_session=True)
    assert parent.stdout.readline().strip() == "fitting"
    os.killpg(parent.pid, signal.SIGINT)
    parent.wait(timeout=120)
    out, err = parent.stdout.read(), parent.stderr.read()   # through the readers that read the first line
    assert parent.returncode == 0, err
    assert out.split()[0] in ("stopped", "finished") and "Traceback" not in err and "KeyboardInterrupt" not in err


@pytest.mark.skipif(not hasattr(os, "killpg"), reason="POSIX: an ignored signal stays ignored across exec")
def test_a_fit_process_starts_with_ctrl_c_already_ignored():
    """A Ctrl-C that comes while a child is still starting (before its first step) must not stop it either."""
    from monitor.store.consolidation_fits import children_ignore_ctrl_c

    ask = [sys.executable, "-c", "import signal; print(signal.getsignal(signal.SIGINT) == signal.SIG_IGN)"]
    with children_ignore_ctrl_c():
        started = subprocess.run(ask, capture_output=True, text=True, timeout=60)
    assert started.stdout.strip() == "True"
    assert signal.getsignal(signal.SIGINT) is signal.default_int_handler   # this process's handler is back
    assert subprocess.run(ask, capture_output=True, text=True, timeout=60).stdout.strip() == "False"
