"""monitor.store.import_pool: when an animal's files are all stored; report entries after an import with workers."""

from __future__ import annotations

import json
import sqlite3

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
