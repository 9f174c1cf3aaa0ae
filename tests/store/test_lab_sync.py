"""The lab store on a real PostgreSQL: two PCs synced and re-synced, a kill -9 and a cut connection mid-sync,
a server that was away, same-name animals, insert-only entries, and reads that equal the local store's.

The reference for every count is the PC's own SQLite store (sqlite3's count) and PostgreSQL's own count;
for the reports, the local store's report of the same data."""

from __future__ import annotations

import json
import math
import os
import signal
import sqlite3
import subprocess
import sys
from pathlib import Path
from typing import Callable

import psycopg
import pytest

from fixtures.races import together
from mock_rig.history import cohort, write_history
from monitor.app.cli import main
from monitor.store import lab_read, lab_schema, lab_sync
from monitor.store.db import open_store
from monitor.store.care_log import add_supplement, add_weighing
from monitor.store.decisions import append_decision
from monitor.store.registry import check_in, check_out
from monitor.core.eligibility.decision_log import Decision
from monitor.store.reporting import report

ROOT = Path(__file__).resolve().parents[2]


def rigside(*args: object) -> int:
    try:
        return main([str(a) for a in args])
    except SystemExit as exc:
        return int(exc.code)


@pytest.fixture(scope="module")
def stores(tmp_path_factory) -> dict[str, Path]:
    """pc1: alder and birch (alder fitted), pc2: cedar and damson, pc3: another alder (other seed); 3 days each."""
    out = tmp_path_factory.mktemp("lab")
    write_history(out / "h1", cohort(4, seed=3), days=3)
    write_history(out / "h3", cohort(1, seed=9), days=2)
    places = {"pc1": ("h1", ("alder", "birch")), "pc2": ("h1", ("cedar", "damson")), "pc3": ("h3", ("alder",))}
    dbs = {}
    for pc, (history, animals) in places.items():
        db = out / f"{pc}.sqlite3"
        for animal in animals:
            files = sorted((out / history).glob(f"{animal}_s*.rsw"))
            fit = () if (pc, animal) == ("pc1", "alder") else ("--no-fit",)
            assert rigside("import", *files, "--protocol", out / history / f"{animal}.protocol.toml", "--db", db,
                           *fit) == 0
        dbs[pc] = db
    conn = open_store(dbs["pc1"])
    conn.execute("BEGIN IMMEDIATE")
    for reason in ("not yet: plateau just reached", "still waiting"):
        append_decision(conn, Decision(decision="deferred", animal="alder", operator="kim", reason=reason,
                                       time="2026-02-10T10:00:00+01:00"))
    session, _ = check_in(conn, animal="birch", rig="box-02", operator="kim", protocol_id=None, weight_before_g=301.5)
    check_out(conn, session)
    add_weighing(conn, "alder", at="2026-02-10T09:00:00+01:00", grams=298.0, by="kim")
    add_supplement(conn, "alder", at="2026-02-10T17:00:00+01:00", ml=2.5, by="kim")
    conn.execute("COMMIT")
    conn.close()
    return dbs


@pytest.fixture
def pcs(stores, tmp_path) -> dict[str, Path]:
    """Fresh copies of the module's stores (a test may change them)."""
    copies = {}
    for pc, db in stores.items():
        copies[pc] = tmp_path / db.name
        source = sqlite3.connect(db)
        target = sqlite3.connect(copies[pc])
        source.backup(target)
        source.close()
        target.close()
    return copies


def local_count(db: Path, sql: str) -> int:
    with sqlite3.connect(db) as conn:
        return conn.execute(sql).fetchone()[0]


def lab_count(url: str, sql: str, *args) -> int:
    with psycopg.connect(url) as pg:
        return pg.execute(sql, args).fetchone()[0]


def do_sync(db: Path, url: str, name: str, **kw) -> lab_sync.SyncResult:
    conn = open_store(db)
    try:
        return lab_sync.sync(conn, url, pc_name=name, **kw)
    finally:
        conn.close()


def test_alembic_init_creates_the_schema_once(lab_url):
    assert lab_schema.head_revision() == lab_schema.HEAD  # Alembic's own view of the revision files
    assert lab_schema.upgrade(lab_url) == (None, lab_schema.head_revision())
    assert lab_schema.upgrade(lab_url) == (lab_schema.head_revision(), lab_schema.head_revision())
    with psycopg.connect(lab_url) as pg:
        assert lab_schema.current_revision(pg) == lab_schema.head_revision()


def test_two_inits_of_a_new_lab_at_once_both_succeed(lab_url):
    # without a lock the second one's CREATE TABLE of the version table waited for the first and then
    # failed on a duplicate catalogue entry (pg_type_typname_nsp_index): 5 of 5 tries
    head = lab_schema.head_revision()
    got = together(lab_schema.upgrade, (lab_url,), 2, expected=(lab_schema.LabError,))
    assert (None, head) in got and (head, head) in got, got  # one created it, the other found it current


def test_two_pcs_synced_then_resynced_change_nothing(pcs, lab_url):
    lab_schema.upgrade(lab_url)
    first = {pc: do_sync(pcs[pc], lab_url, pc) for pc in ("pc1", "pc2")}
    for number, pc in enumerate(("pc1", "pc2"), start=1):
        assert first[pc].pc_number == number
        # reference: the PC's own SQLite store
        for table in ("events", "trials"):
            assert lab_count(lab_url, f"SELECT count(*) FROM {table} WHERE pc_id = %s", number) == \
                local_count(pcs[pc], f"SELECT count(*) FROM {table}")
        for table in ("sessions", "decisions", "trial_builds", "animals", "care_log", "checkins", "protocols"):
            assert lab_count(lab_url, "SELECT count(*) FROM records WHERE pc_id = %s AND tbl = %s", number, table) \
                == local_count(pcs[pc], f"SELECT count(*) FROM {table}")
    total = lab_count(lab_url, "SELECT count(*) FROM events")
    assert total == sum(local_count(pcs[pc], "SELECT count(*) FROM events") for pc in ("pc1", "pc2"))
    again = {pc: do_sync(pcs[pc], lab_url, pc) for pc in ("pc1", "pc2")}
    assert all(result.total == 0 for result in again.values())
    assert lab_count(lab_url, "SELECT count(*) FROM events") == total


def test_two_pcs_syncing_at_the_same_time(pcs, lab_url):
    from concurrent.futures import ThreadPoolExecutor

    lab_schema.upgrade(lab_url)
    with ThreadPoolExecutor(2) as pool:
        results = list(pool.map(lambda pc: do_sync(pcs[pc], lab_url, pc, chunk_rows=3000), ("pc1", "pc2")))
    assert sorted(r.pc_number for r in results) == [1, 2]
    for result, pc in zip(results, ("pc1", "pc2")):
        assert lab_count(lab_url, "SELECT count(*) FROM events WHERE pc_id = %s", result.pc_number) == \
            local_count(pcs[pc], "SELECT count(*) FROM events")
    assert lab_count(lab_url, "SELECT count(*) FROM animals") == 4  # alder, birch, cedar, damson: once each


def sync_during(db: Path, url: str, name: str, other: Callable[[], object]) -> list[object]:
    """Sync `db`, and while its first chunk of events is committed run `other`; what `other` returned or raised."""
    seen: list[object] = []

    def midway(table: str, done: int, end: int) -> None:
        if table == "events" and not seen:
            try:
                seen.append(other())
            except Exception as exc:  # noqa: BLE001 - the test looks at it
                seen.append(exc)

    do_sync(db, url, name, chunk_rows=1000, progress=midway)
    return seen


def test_a_second_sync_of_the_same_pc_waits_its_turn(pcs, lab_url):
    lab_schema.upgrade(lab_url)
    seen = sync_during(pcs["pc2"], lab_url, "pc2", lambda: do_sync(pcs["pc2"], lab_url, "pc2"))
    assert isinstance(seen[0], lab_schema.LabBusy) and "another sync of pc2" in str(seen[0])
    assert do_sync(pcs["pc2"], lab_url, "pc2").total == 0


def test_labs_in_two_schemas_of_one_database_do_not_wait_for_each_other(pcs, lab_url):
    """Each lab's first PC is PC 1; PostgreSQL's advisory locks are database-wide."""
    schema = lab_url.rsplit("application_name=", 1)[1]
    other_schema = schema + "_b"
    other_url = lab_url.replace(f"search_path%3D{schema}", f"search_path%3D{other_schema}")
    with psycopg.connect(lab_url, autocommit=True) as admin:
        admin.execute(f"CREATE SCHEMA {other_schema}")
        try:
            for url in (lab_url, other_url):
                lab_schema.upgrade(url)
            seen = sync_during(pcs["pc1"], lab_url, "pc1", lambda: do_sync(pcs["pc2"], other_url, "pc2"))
            assert isinstance(seen[0], lab_sync.SyncResult) and seen[0].pc_number == 1
            # reference: the PC's own SQLite store
            assert lab_count(other_url, "SELECT count(*) FROM events") == \
                local_count(pcs["pc2"], "SELECT count(*) FROM events")
        finally:
            admin.execute(f"DROP SCHEMA {other_schema} CASCADE")


def test_one_more_session_sends_only_its_rows(pcs, lab_url, tmp_path):
    lab_schema.upgrade(lab_url)
    do_sync(pcs["pc2"], lab_url, "pc2")
    before = local_count(pcs["pc2"], "SELECT count(*) FROM events")
    write_history(tmp_path / "more", cohort(4, seed=3), days=4)
    extra = sorted((tmp_path / "more").glob("cedar_s*.rsw"))[-1]
    assert rigside("import", extra, "--animal", "cedar", "--protocol", tmp_path / "more" / "cedar.protocol.toml",
                   "--db", pcs["pc2"], "--no-fit") == 0
    added = local_count(pcs["pc2"], "SELECT count(*) FROM events") - before
    result = do_sync(pcs["pc2"], lab_url, "pc2")
    assert added > 0 and result.sent["events"] == added
    assert result.sent["sessions"] == 1 and result.sent["trial_builds"] == 1
    assert result.sent["trials"] == local_count(pcs["pc2"], "SELECT count(*) FROM trials WHERE session_id = "
                                                            "(SELECT max(id) FROM sessions)")


def test_a_changed_row_is_sent_again_and_the_lab_report_follows(pcs, lab_url):
    from monitor.store.registry import exclude_session

    lab_schema.upgrade(lab_url)
    do_sync(pcs["pc2"], lab_url, "pc2")
    conn = open_store(pcs["pc2"])
    conn.execute("BEGIN IMMEDIATE")
    exclude_session(conn, 2, "cable unplugged half-way", "kim")
    conn.execute("COMMIT")
    local = report(conn, "cedar")
    conn.close()
    result = do_sync(pcs["pc2"], lab_url, "pc2")
    assert result.sent["sessions"] == 1 and result.total == 1
    lab = lab_read.report(lab_url, "cedar")
    assert lab == local and lab["animals"][0]["sessions"][1]["excluded"] is True


@pytest.mark.slow  # a recorder writing while syncs run
def test_a_sync_while_the_store_is_being_written_sends_every_row_once(pcs, lab_url):
    """Rows keep arriving (as from the window's writer) while a sync runs; a second sync catches the rest."""
    import threading

    lab_schema.upgrade(lab_url)
    stop = threading.Event()

    def record() -> None:
        writer = sqlite3.connect(pcs["pc2"], isolation_level=None, timeout=30)
        while not stop.wait(0.005):  # a batch every few ms, as a writer commits (a tight loop starves the sync)
            writer.execute("BEGIN IMMEDIATE")
            writer.execute("INSERT INTO events (session_id, segment, line, t_us, raw_time, code, value, wall) "
                           "SELECT session_id, segment, line, t_us, raw_time, code, value, wall FROM events "
                           "WHERE rowid <= 200")
            writer.execute("COMMIT")
        writer.close()

    before = local_count(pcs["pc2"], "SELECT count(*) FROM events")
    thread = threading.Thread(target=record)
    thread.start()
    try:
        do_sync(pcs["pc2"], lab_url, "pc2", chunk_rows=2000)
    finally:
        stop.set()
        thread.join()
    do_sync(pcs["pc2"], lab_url, "pc2")
    local = local_count(pcs["pc2"], "SELECT count(*) FROM events")
    assert local > before and lab_count(lab_url, "SELECT count(*) FROM events") == local
    assert lab_count(lab_url, "SELECT count(DISTINCT rid) FROM events") == local
    assert lab_count(lab_url, "SELECT max(rid) FROM events") == local_count(pcs["pc2"], "SELECT max(rowid) FROM events")


def test_kill_9_mid_sync_then_resume_sends_each_event_once(pcs, lab_url):
    lab_schema.upgrade(lab_url)
    do_sync(pcs["pc2"], lab_url, "pc2")
    env = dict(os.environ, PYTHONUNBUFFERED="1")
    proc = subprocess.Popen([sys.executable, "-m", "monitor.app", "sync", "--db", str(pcs["pc1"]), "--lab", lab_url,
                             "--pc-name", "pc1", "--chunk-rows", "300", "--progress"],
                            stderr=subprocess.PIPE, text=True, env=env, cwd=ROOT)
    try:
        for line in proc.stderr:
            if line.startswith("events: up to row"):
                os.kill(proc.pid, signal.SIGKILL)
                break
        proc.wait(timeout=60)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    assert proc.returncode == -signal.SIGKILL
    local = local_count(pcs["pc1"], "SELECT count(*) FROM events")
    partial = lab_count(lab_url, "SELECT count(*) FROM events WHERE pc_id = 2")
    assert 0 < partial < local  # killed in the middle
    assert sync_when_free(pcs["pc1"], lab_url, "pc1").sent["events"] == local - partial
    pc2 = local_count(pcs["pc2"], "SELECT count(*) FROM events")
    assert lab_count(lab_url, "SELECT count(*) FROM events") == local + pc2
    assert lab_count(lab_url, "SELECT count(DISTINCT (pc_id, rid)) FROM events") == local + pc2


def sync_when_free(db: Path, url: str, name: str) -> lab_sync.SyncResult:
    """A sync, waiting up to 10 s for the server to notice that the killed one is gone (its lock)."""
    import time

    for _ in range(20):
        try:
            return do_sync(db, url, name)
        except lab_schema.LabError as exc:
            if "another sync" not in str(exc):
                raise
            time.sleep(0.5)
    return do_sync(db, url, name)


def test_connection_cut_mid_sync_then_catch_up(pcs, lab_url):
    lab_schema.upgrade(lab_url)
    name = lab_url.rsplit("application_name=", 1)[1]
    admin = psycopg.connect(lab_url, autocommit=True)

    def cut(table: str, done: int, end: int) -> None:
        if table == "events":
            admin.execute("SELECT pg_terminate_backend(pid) FROM pg_stat_activity WHERE application_name = %s "
                          "AND pid <> pg_backend_pid()", (name,))

    with pytest.raises(lab_schema.LabUnreachable, match="connection lost"):
        do_sync(pcs["pc1"], lab_url, "pc1", chunk_rows=1000, progress=cut)
    admin.close()
    conn = open_store(pcs["pc1"])
    status = lab_sync.sync_status(conn)
    conn.close()
    assert status["unreachable_since"] is not None and status["rows_waiting"] > 0
    partial = lab_count(lab_url, "SELECT count(*) FROM events")
    assert partial == 1000  # the first chunk was committed with its bookmark before the cut
    local = local_count(pcs["pc1"], "SELECT count(*) FROM events")
    assert sync_when_free(pcs["pc1"], lab_url, "pc1").sent["events"] == local - partial
    assert lab_count(lab_url, "SELECT count(DISTINCT rid) FROM events") == local
    conn = open_store(pcs["pc1"])
    status = lab_sync.sync_status(conn)
    conn.close()
    assert status["unreachable_since"] is None and status["rows_waiting"] == 0


def test_a_server_away_is_caught_up_with_nothing_lost(pcs, lab_url):
    lab_schema.upgrade(lab_url)
    with socket_closed() as dead:
        with pytest.raises(lab_schema.LabUnreachable, match="unreachable"):
            do_sync(pcs["pc2"], dead, "pc2")
    result = do_sync(pcs["pc2"], lab_url, "pc2")
    assert result.sent["events"] == local_count(pcs["pc2"], "SELECT count(*) FROM events")


class socket_closed:
    """A URL on a local port nobody listens on."""

    def __enter__(self) -> str:
        import socket
        self.sock = socket.socket()
        self.sock.bind(("127.0.0.1", 0))  # bound, never listening: connections are refused
        return f"postgresql://postgres@127.0.0.1:{self.sock.getsockname()[1]}/test"

    def __exit__(self, *exc: object) -> None:
        self.sock.close()


def set_lab_id(db: Path, animal: str, lab_id: str) -> None:
    """The animal record's lab id (the column comes with the animal records; added here if this store lacks it)."""
    with sqlite3.connect(db) as conn:
        if not any(r[1] == "lab_id" for r in conn.execute("PRAGMA table_info(animals)")):
            conn.execute("ALTER TABLE animals ADD COLUMN lab_id TEXT")
        conn.execute("UPDATE animals SET lab_id = ? WHERE name = ?", (lab_id, animal))


def test_same_name_on_two_pcs_is_refused_until_lab_ids_tell_them_apart(pcs, lab_url):
    lab_schema.upgrade(lab_url)
    do_sync(pcs["pc1"], lab_url, "room-a")
    with pytest.raises(lab_sync.SyncRefused) as refused:
        do_sync(pcs["pc3"], lab_url, "room-b")
    assert "'alder'" in str(refused.value) and "room-a" in str(refused.value) and "room-b" in str(refused.value)
    assert lab_count(lab_url, "SELECT count(*) FROM records WHERE pc_id = 2") == 0  # nothing of room-b was taken
    conn = open_store(pcs["pc3"])
    assert "room-a" in lab_sync.sync_status(conn)["last_error"]  # what the window's status bar says
    conn.close()
    set_lab_id(pcs["pc1"], "alder", "RT-101")
    set_lab_id(pcs["pc3"], "alder", "RT-205")
    do_sync(pcs["pc1"], lab_url, "room-a")
    do_sync(pcs["pc3"], lab_url, "room-b")
    with lab_read.Lab(lab_url) as lab:
        shown = {a.shown: a.places for a in lab.animals()}
    assert shown["alder@RT-101"] == ((1, "alder"),) and shown["alder@RT-205"] == ((2, "alder"),)
    # the lab's report of each alder equals its own PC's report (the name shown aside)
    lab_doc = lab_read.report(lab_url, "alder@RT-205")["animals"][0]
    conn = open_store(pcs["pc3"], readonly=True)
    local = report(conn, "alder")["animals"][0]
    conn.close()
    assert dict(lab_doc, animal="alder") == local


def test_the_same_lab_id_on_two_pcs_is_one_animal(pcs, lab_url):
    lab_schema.upgrade(lab_url)
    set_lab_id(pcs["pc1"], "alder", "RT-101")
    set_lab_id(pcs["pc3"], "alder", "RT-101")
    do_sync(pcs["pc1"], lab_url, "room-a")
    do_sync(pcs["pc3"], lab_url, "room-b")
    with lab_read.Lab(lab_url) as lab:
        alder = next(a for a in lab.animals() if a.name == "alder")
    assert alder.shown == "alder" and alder.places == ((1, "alder"), (2, "alder"))
    sessions = sum(local_count(pcs[pc], "SELECT count(*) FROM sessions WHERE animal = 'alder'") for pc in ("pc1", "pc3"))
    assert len(lab_read.report(lab_url, "alder")["animals"][0]["sessions"]) == sessions


def test_entries_are_insert_only_on_the_server_and_tampering_is_found(pcs, lab_url, capsys):
    lab_schema.upgrade(lab_url)
    do_sync(pcs["pc1"], lab_url, "pc1")
    do_sync(pcs["pc2"], lab_url, "pc2")
    with psycopg.connect(lab_url) as pg:
        for statement in ("UPDATE records SET data = jsonb_set(data, '{reason}', '\"ready\"') WHERE tbl = 'decisions'",
                          "DELETE FROM records WHERE tbl = 'decisions'",
                          "UPDATE records SET data = jsonb_set(data, '{amount}', '5') WHERE tbl = 'care_log'",
                          "DELETE FROM records WHERE tbl = 'care_log'", "TRUNCATE records"):
            with pytest.raises(psycopg.errors.RaiseException, match="insert-only"):  # PostgreSQL's trigger
                pg.execute(statement)
            pg.rollback()
    assert rigside("log", "verify", "--lab", lab_url) == 0
    assert "pc1: 2 entries, chain intact" in capsys.readouterr().out
    with psycopg.connect(lab_url) as pg:  # someone with the owner's rights goes round the trigger
        pg.execute("ALTER TABLE records DISABLE TRIGGER records_entries_insert_only")
        pg.execute("UPDATE records SET data = jsonb_set(data, '{reason}', '\"ready now\"') WHERE tbl = 'decisions' "
                   "AND key = '1'")
        pg.execute("ALTER TABLE records ENABLE TRIGGER records_entries_insert_only")
    assert rigside("log", "verify", "--lab", lab_url) == 1
    err = capsys.readouterr().err
    assert len(err.strip().splitlines()) == 1 and "BROKEN on pc1" in err and "pc2" not in err


def test_a_tampered_care_entry_on_the_server_is_named_by_pc_animal_and_entry(pcs, lab_url, capsys):
    lab_schema.upgrade(lab_url)
    do_sync(pcs["pc1"], lab_url, "pc1")
    do_sync(pcs["pc2"], lab_url, "pc2")
    assert rigside("log", "verify", "--db", pcs["pc1"]) == 0
    local = capsys.readouterr().out.splitlines()  # reference: the PC's own store, checked by `log verify --db`
    assert rigside("log", "verify", "--lab", lab_url) == 0
    assert f"pc1: {local[0]}; {local[1]}" in capsys.readouterr().out
    supplement = local_count(pcs["pc1"], "SELECT id FROM care_log WHERE kind = 'supplement'")
    with psycopg.connect(lab_url) as pg:
        for statement in ("UPDATE records SET data = jsonb_set(data, '{amount}', '5') WHERE tbl = 'care_log'",
                          "DELETE FROM records WHERE tbl = 'care_log'"):
            with pytest.raises(psycopg.errors.RaiseException, match="care_log entries are insert-only"):
                pg.execute(statement)  # PostgreSQL's trigger refuses it
            pg.rollback()
        pg.execute("ALTER TABLE records DISABLE TRIGGER records_entries_insert_only")  # the owner goes round it
        pg.execute("UPDATE records SET data = jsonb_set(data, '{amount}', '5.0') WHERE tbl = 'care_log' AND pc_id = 1 "
                   "AND key = %s", (str(supplement),))
        pg.execute("ALTER TABLE records ENABLE TRIGGER records_entries_insert_only")
    assert rigside("log", "verify", "--lab", lab_url) == 1
    err = capsys.readouterr().err
    assert len(err.strip().splitlines()) == 1 and "pc2" not in err
    assert f"BROKEN on pc1: care entry {supplement}: its content was changed" in err and "(animal alder)" in err


def test_a_care_entry_deleted_round_the_trigger_is_found(pcs, lab_url, capsys):
    lab_schema.upgrade(lab_url)
    do_sync(pcs["pc1"], lab_url, "pc1")
    first = local_count(pcs["pc1"], "SELECT min(id) FROM care_log")
    with psycopg.connect(lab_url) as pg:
        pg.execute("ALTER TABLE records DISABLE TRIGGER records_entries_insert_only")
        pg.execute("DELETE FROM records WHERE tbl = 'care_log' AND key = %s", (str(first),))
        pg.execute("ALTER TABLE records ENABLE TRIGGER records_entries_insert_only")
    assert rigside("log", "verify", "--lab", lab_url) == 1
    err = capsys.readouterr().err
    assert f"pc1: care entry {first + 1}: does not follow the entry before it" in err and "alder" in err


def test_report_from_the_lab_equals_the_local_reports(pcs, lab_url):
    lab_schema.upgrade(lab_url)
    for pc in ("pc1", "pc2"):
        do_sync(pcs[pc], lab_url, pc)
    local = []
    for pc in ("pc1", "pc2"):
        conn = open_store(pcs[pc], readonly=True)
        local += report(conn)["animals"]
        conn.close()
    lab = lab_read.report(lab_url)
    assert [a["animal"] for a in lab["animals"]] == ["alder", "birch", "cedar", "damson"]
    assert json.dumps(lab, sort_keys=True) == json.dumps({"animals": local}, sort_keys=True)
    fitted = lab["animals"][0]["consolidation"]
    assert fitted["status"] != "not fitted" and fitted["current"] is True  # pc1's cached fit came along


@pytest.mark.slow
def test_export_from_the_lab_holds_every_pcs_rows(pcs, lab_url, tmp_path):
    import csv

    lab_schema.upgrade(lab_url)
    for pc in ("pc1", "pc2"):
        do_sync(pcs[pc], lab_url, pc)
    for what in ("events", "trials"):
        assert rigside("export", what, "--lab", lab_url, "--csv", tmp_path / f"lab-{what}.csv") == 0
        local = []
        for pc in ("pc1", "pc2"):
            assert rigside("export", what, "--db", pcs[pc], "--csv", tmp_path / f"{pc}-{what}.csv") == 0
            with open(tmp_path / f"{pc}-{what}.csv", newline="", encoding="utf-8") as f:
                rows = list(csv.DictReader(f))
            for row in rows:  # the second PC's session ids are shifted by its number x 10^9
                row["session"] = str(int(row["session"]) + (0 if pc == "pc1" else 2 * lab_read.ID_SHIFT))
            local += rows
        with open(tmp_path / f"lab-{what}.csv", newline="", encoding="utf-8") as f:
            lab = list(csv.DictReader(f))
        key = (lambda r: (r["animal"], int(r["session"]), int(r["line"]))) if what == "events" else \
            (lambda r: (r["animal"], int(r["session"]), int(r["trial"])))
        assert sorted(lab, key=key) == sorted(local, key=key)


def test_values_keep_their_type_through_the_lab():
    for value in (b"\x00\xff raw", float("inf"), -0.5, 3, "t\u00e9xt\t\\", None):
        back = lab_sync.decode_value(json.loads(json.dumps(lab_sync.encode_value(value))))
        assert back == value and type(back) is type(value)
    assert math.isnan(lab_sync.decode_value(lab_sync.encode_value(float("nan"))))
