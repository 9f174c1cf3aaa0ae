"""monitor.store.import_pool: when an animal's files are all stored; files parsed in order, some taken back from a
slow worker; the collector's thresholds while storing; report entries after an import with workers."""

from __future__ import annotations

import json
import os
import sqlite3
import sys
from pathlib import Path

import pytest

from monitor.store.import_pool import Finished


def test_an_animal_is_finished_after_its_last_file_and_a_mapped_file_holds_back_every_animal():
    # files in the order given: two of alder, one of birch, a mapped file (any animal), one of cedar
    finished = Finished(["alder", "alder", "birch", None, "cedar"])
    assert finished.stored("alder", ["alder"]) == []           # alder has a file still to come
    assert finished.stored("alder", ["alder"]) == []           # ... and a mapped file may hold alder too
    assert finished.stored("birch", ["birch"]) == []
    assert finished.stored(None, ["alder", "dunlin"]) == ["alder", "birch", "dunlin"]
    assert finished.stored("cedar", ["cedar"]) == ["cedar"]
    assert finished.rest() == []


def test_a_cut_short_import_tells_the_stored_animals_at_the_end():
    finished = Finished(["alder", "birch", "birch"])
    assert finished.stored("alder", ["alder"]) == ["alder"]
    assert finished.stored("birch", ["birch"]) == []
    assert finished.rest() == ["birch"]


@pytest.mark.slow
def test_an_import_with_worker_processes_keeps_current_report_entries(tmp_path, capsys, mock_history):
    from monitor.app.cli import main
    from monitor.store.reporting import report_fingerprint

    out, truth = mock_history
    db = tmp_path / "pool.sqlite3"
    files = sorted(str(p) for p in out.glob("*_s*.rsw"))
    assert main(["import", *files, "--protocol", str(out / f"{sorted(truth['animals'])[0]}.protocol.toml"),
                 "--db", str(db), "--no-fit", "--jobs", "2", "--quiet"]) == 0
    conn = sqlite3.connect(db)
    kept = dict(conn.execute("SELECT a.name, r.fingerprint FROM report_cache AS r JOIN animals AS a "
                             "ON a.id = r.animal_id"))
    assert sorted(kept) == sorted(truth["animals"])
    assert all(kept[animal] == report_fingerprint(conn, animal) for animal in kept)  # current: read from cache
    from monitor.store.db import open_store
    from monitor.store.reporting import build_entry

    store = open_store(db, readonly=True)
    built = dict(conn.execute("SELECT a.name, r.entry FROM report_cache AS r JOIN animals AS a ON a.id = r.animal_id"))
    for animal in kept:  # the kept entry is the one built from the same rows
        assert json.loads(built[animal]) == json.loads(json.dumps(build_entry(store, animal)))
    store.close()


@pytest.mark.slow  # starts a worker process
def test_files_come_back_in_order_and_the_importing_process_parses_while_the_worker_is_slow():
    from fixtures.pool_jobs import slow_in_a_worker

    from monitor.store.import_pool import HANDOFF_SWITCH_S, ImportPool

    contents = [(Path(f"f{i}.rsw"), f"file {i}".encode()) for i in range(8)]
    done: list[str] = []
    before = sys.getswitchinterval()
    with ImportPool(1) as pool:
        out = list(pool.parse_all(slow_in_a_worker, contents, {"pause_s": 0.5}, meanwhile=lambda: done.append("ran")))
        assert sys.getswitchinterval() == HANDOFF_SWITCH_S  # results are handed over promptly meanwhile
    assert sys.getswitchinterval() == before
    assert done == ["ran"]  # the work given to do meanwhile, once
    assert [(path, upper) for path, upper, _ in out] == [(path, data.upper()) for path, data in contents]
    here = [path.name for path, _, pid in out if pid == os.getpid()]
    assert here[0] == "f0.rsw" and len(here) > 1  # the first, and later ones taken back from the slow worker


@pytest.mark.slow  # starts a worker process
def test_a_file_taken_back_that_fails_raises_at_its_turn_after_the_files_before_it():
    from fixtures.pool_jobs import slow_in_a_worker

    from monitor.store.import_pool import ImportPool

    contents = [(Path(f"f{i}.rsw"), b"bad" if i == 6 else f"file {i}".encode()) for i in range(8)]
    got = []
    before = sys.getswitchinterval()
    with pytest.raises(ValueError, match="f6.rsw"):
        with ImportPool(1) as pool:
            for path, _, _ in pool.parse_all(slow_in_a_worker, contents, {"pause_s": 0.5}):
                got.append(path.name)
    assert got == [f"f{i}.rsw" for i in range(6)]


def test_few_collections_raises_the_youngest_threshold_inside_and_restores_all_three_after_an_error():
    import gc

    from monitor.store.import_pool import FEW_COLLECTIONS, few_collections

    before = gc.get_threshold()
    with pytest.raises(RuntimeError):
        with few_collections():
            assert gc.get_threshold() == (FEW_COLLECTIONS, *before[1:])
            raise RuntimeError("stop")
    assert gc.get_threshold() == before


STARTING_WORKER = """
import os, signal, sys
from monitor.store.import_pool import ImportPool
received = []
signal.signal(signal.SIGINT, lambda *_: received.append(1))   # the importing process handles Ctrl-C itself
with ImportPool(1) as pool:
    pool.done_parsing()
    started = pool.submit(os.getpid)         # spawns the worker, which is still starting when ...
    os.killpg(os.getpgid(0), signal.SIGINT)  # ... a terminal's Ctrl-C reaches the whole group
    print(started.result(timeout=120) != os.getpid(), bool(received))
"""


@pytest.mark.slow
@pytest.mark.skipif(not hasattr(os, "killpg"), reason="POSIX process groups")
def test_a_worker_still_starting_ignores_a_terminal_ctrl_c():
    """Before its initializer runs a worker is an interpreter importing modules; Ctrl-C there printed a
    traceback and broke the pool."""
    import subprocess
    import sys

    run = subprocess.run([sys.executable, "-c", STARTING_WORKER], capture_output=True, text=True, timeout=180,
                         start_new_session=True, cwd=Path(__file__).resolve().parents[2])
    assert run.returncode == 0, run.stderr
    assert run.stdout.split() == ["True", "True"]   # the job ran in the worker; the parent saw the Ctrl-C
    assert "KeyboardInterrupt" not in run.stderr and "Traceback" not in run.stderr
