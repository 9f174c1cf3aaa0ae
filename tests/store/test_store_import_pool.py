"""monitor.store.import_pool: when an animal's files are all stored; workers storing each file whole, halted and
cancelled; the collector's thresholds while storing; report entries after an import with workers."""

from __future__ import annotations

import json
import os
import sqlite3
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


def _whole(conn: sqlite3.Connection) -> list[tuple[str, int, int]]:
    """Per stored file: its name, the events its import row counts, and the events its sessions hold."""
    return conn.execute("SELECT i.path, i.events, (SELECT count(*) FROM events AS e JOIN sessions AS s "
                        "ON s.id = e.session_id WHERE s.import_id = i.id) FROM imports AS i ORDER BY i.id").fetchall()


@pytest.mark.slow  # starts worker processes
def test_workers_store_each_file_whole_and_a_halt_begins_no_other(tmp_path, mock_history):
    """Two workers read and store the files; once halted, the files not begun are not stored and the ones
    under way finish whole: what was stored is exactly what the futures report."""
    from concurrent.futures import FIRST_COMPLETED, wait

    from monitor.store.db import open_store
    from monitor.store.import_pool import ImportPool, import_file
    from monitor.store.importer import Abandoned

    out, _ = mock_history
    paths = sorted(out.glob("alder_s*.rsw")) + sorted(out.glob("birch_s*.rsw"))
    db = tmp_path / "halt.sqlite3"
    conn = open_store(db)
    text = (out / "alder.protocol.toml").read_text()
    store = {"protocol_text": text, "protocol_name": "alder", "protocol_version": 1, "mapping_text": None}
    jobs = [(str(db), 5000, p, p.read_bytes(), {"protocol_text": text}, store, [], "tester") for p in paths]
    with ImportPool(2) as pool:
        futures = pool.hand_out(import_file, jobs)
        wait(futures, return_when=FIRST_COMPLETED)
        pool.halt(futures)
        wait(futures)
    stored, not_stored = [], 0
    for future, index in futures.items():
        if future.cancelled():
            not_stored += 1
            continue
        try:
            result, replaced = future.result()
        except Abandoned:
            not_stored += 1
            continue
        stored.append(paths[index].name)
        assert replaced == 0 and result.events > 0
    rows = _whole(conn)
    assert not_stored > 0 and stored  # halted after the first: some files were never begun
    assert sorted(Path(p).name for p, _, _ in rows) == sorted(stored)
    assert all(counted == held for _, counted, held in rows)  # every stored file whole
    conn.close()


def test_a_file_whose_import_is_cancelled_before_its_commit_leaves_nothing(tmp_path, mock_history):
    from monitor.store.db import open_store
    from monitor.store.importer import Abandoned, commit_file, parse_file

    out, _ = mock_history
    path = sorted(out.glob("alder_s*.rsw"))[0]
    text = (out / "alder.protocol.toml").read_text()
    conn = open_store(tmp_path / "cancel.sqlite3")
    parsed = parse_file(path, path.read_bytes(), protocol_text=text)
    with pytest.raises(Abandoned, match="rolled back"):
        commit_file(conn, parsed, [], "tester", keep=lambda: False, protocol_text=text, protocol_name="alder",
                    protocol_version=1)
    assert not conn.in_transaction
    assert [conn.execute(f"SELECT count(*) FROM {t}").fetchone()[0] for t in ("imports", "sessions", "events")] \
        == [0, 0, 0]
    result, _ = commit_file(conn, parsed, [], "tester", keep=lambda: True, protocol_text=text,
                            protocol_name="alder", protocol_version=1)
    assert _whole(conn) == [(str(path), result.events, result.events)]
    conn.close()


class StopsAfter:
    """A tracker asked to stop once `files` files are stored: by the window's Cancel (`cancelled`), or by a
    second Ctrl-C while the next line is said (`hard`)."""

    def __init__(self, files: int, hard: bool) -> None:
        self.files, self.hard, self.told = files, hard, 0

    def begin(self, total: int, unit: str, label: str) -> None: ...

    def advance(self, amount: int = 1) -> None: ...

    def cancelled(self) -> bool:
        return self.told >= self.files

    def say(self, line: str) -> None:
        if line.startswith("["):
            self.told += 1
            if self.hard and self.told > self.files:
                raise KeyboardInterrupt


@pytest.mark.slow  # starts worker processes
@pytest.mark.parametrize("hard", [False, True])
def test_an_import_stopped_while_workers_store_names_exactly_what_it_stored_and_resumes(tmp_path, mock_history,
                                                                                          hard):
    """Stopped after two files (and, `hard`, a second Ctrl-C while the next is named): the files stored are
    exactly those counted, each whole, and the same command with --skip-imported stores the rest."""
    from monitor.app.commands.import_files import import_files
    from monitor.app.progress import Progress

    out, _ = mock_history
    paths = sorted(out.glob("*_s*.rsw"))
    protocol = out / f"{paths[0].name.split('_s')[0]}.protocol.toml"
    db = tmp_path / "stopped.sqlite3"
    first = import_files(db, paths, protocol, StopsAfter(2, hard), jobs=2)
    conn = sqlite3.connect(db)
    rows = _whole(conn)
    assert first.stopped and first.imported >= 2  # (the files under way finish: small ones may all be done)
    assert len(rows) == first.imported and all(counted == held for _, counted, held in rows)
    assert first.last in {Path(p).name for p, _, _ in rows}
    rest = import_files(db, paths, protocol, Progress(quiet=True), jobs=2, skip_imported=True)
    assert rest.imported == len(paths) - first.imported and len(rest.skipped) == first.imported
    assert len(_whole(conn)) == len(paths) and all(counted == held for _, counted, held in _whole(conn))
    conn.close()


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
    pool.all_handed_out()
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
