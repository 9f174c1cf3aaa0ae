"""`rigside import`, `report`, `export trials|--nwb`, `decide` and `log` through the CLI: results, exit codes,
one-line errors, and the store's faults (corrupt or newer file, a lock held by another process, a full disk)."""

from __future__ import annotations

import csv
import errno
import hashlib
import json
import os
import sqlite3
import subprocess
import sys
from pathlib import Path

import pytest

from monitor.store.db import open_store
from fixtures.devices import run_child as cli
from fixtures.devices import run_main as run_cli
from fixtures.disks import FullDisk

pytestmark = pytest.mark.slow  # subprocesses and a simulated history: seconds per test

ELIGIBILITY = """
[eligibility]
cohort = "orchard"

[eligibility.groups.early]
label = "plateaued, early"
min_sessions_since_plateau = 0
max_sessions_since_plateau = 50
"""


def import_animal(capsys, db: Path, out: Path, animal: str, *extra: str, first: int | None = None
                  ) -> tuple[int, str, str]:
    files = sorted(out.glob(f"{animal}_s*.rsw"))[:first]
    return run_cli(capsys, "import", *files, "--protocol", out / f"{animal}.protocol.toml", "--db", db, *extra)


def one_line(err: str) -> bool:
    return len(err.strip().splitlines()) == 1


def digest(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def test_import_report_and_reimport_refusal(tmp_path, capsys, mock_history):
    out, truth = mock_history
    db = tmp_path / "store.sqlite3"
    fitted = {"alder": (), "birch": ("--no-fit",)}  # import refits in a child process unless told not to
    for animal in truth["animals"]:
        code, stdout, err = import_animal(capsys, db, out, animal, *fitted[animal])
        assert code == 0, err
        n = len(truth["animals"][animal]["sessions"])
        assert f"[{n}/{n}]" in err and f"imported {n} files: {n} sessions" in stdout  # progress, one line per file
        assert (f"fit {animal}:" in err) == (not fitted[animal])
    code, stdout, err = run_cli(capsys, "report", "--db", db, "--json")
    assert code == 0, err
    document = json.loads(stdout)
    for entry in document["animals"]:
        expected = truth["animals"][entry["animal"]]["sessions"]
        assert [(s["index"], s["trials"], s["hits"]) for s in entry["sessions"]] == \
            [(s["index"], s["trials"], s["hits"]) for s in expected]
        assert set(entry["plateau"]) >= {"reached", "session", "rule"}
        c = entry["consolidation"]
        # six days of training are far below the estimator's minimum (1000 final-stage trials in 4 sessions):
        # the fit is cached as "too few trials"; without a fit the report says "not fitted"; both [0, 1]
        status = "not fitted" if fitted[entry["animal"]] else "too few trials"
        assert (c["session"], c["estimate"], c["low"], c["high"], c["status"]) == (len(expected), 0.0, 0.0, 1.0,
                                                                                  status)
    one = json.loads(run_cli(capsys, "report", "--db", db, "--animal", "alder", "--json")[1])
    assert [a["animal"] for a in one["animals"]] == ["alder"]
    before = digest(db)
    code, _, err = import_animal(capsys, db, out, "alder")
    assert code == 2 and one_line(err) and "already imported" in err
    assert digest(db) == before


@pytest.mark.parametrize("args, names", [
    (["report", "--animal", "nobody"], "--animal"),
    (["import", "missing.rsw", "--protocol", "p.toml"], "--protocol"),
    (["decide", "--animal", "nobody", "--decision", "eligible", "--operator", "ana", "--reason", "r"], "--animal"),
    (["decide", "--animal", "x", "--decision", "maybe", "--operator", "ana", "--reason", "r"], "--decision"),
    (["log", "verify", "--head", "3:abc"], "--head"),
    (["export", "events"], "--csv"),
    (["export", "--nwb", "out", "--jobs", "-1"], "--jobs"),
])
def test_bad_input_is_one_line_and_exit_2(tmp_path, capsys, args, names):
    db = tmp_path / "store.sqlite3"
    open_store(db).close()
    code, _, err = run_cli(capsys, *args, "--db", db)
    assert code == 2 and one_line(err) and names in err, err


def test_export_trials_csv_and_nwb(tmp_path, capsys, mock_history):
    pynwb = pytest.importorskip("pynwb")
    out, truth = mock_history
    db = tmp_path / "store.sqlite3"
    assert import_animal(capsys, db, out, "alder", first=2)[0] == 0
    sessions = truth["animals"]["alder"]["sessions"][:2]
    sqlite = sqlite3.connect(db)
    sqlite.execute("INSERT INTO animals (name, created_at) VALUES ('x', 0)")  # a row the export must not need
    sqlite.execute("UPDATE animals SET species = 'Rattus norvegicus', sex = 'F', genotype = '=cmd()', "
                   "date_of_birth = '2025-10-01', cohort = 'orchard' WHERE name = 'alder'")
    sqlite.execute("UPDATE sessions SET excluded = 1, exclusion_reason = '@cable loose' WHERE id = 2")
    sqlite.commit()
    sqlite.close()
    trials_csv = tmp_path / "trials.csv"
    code, stdout, err = run_cli(capsys, "export", "trials", "--db", db, "--csv", trials_csv)
    assert code == 0, err
    with open(trials_csv, newline="") as fh:
        rows = list(csv.DictReader(fh))
    completed = sum(s["trials"] for s in sessions)
    assert sum(r["outcome"] in ("hit", "miss") for r in rows) == completed
    assert {"interval_ms", "outcome", "target_ms", "window_low_ms", "window_high_ms", "stage"} <= set(rows[0])
    assert {r["excluded"] for r in rows if r["session"] == "2"} == {"1"}

    nwb_dir = tmp_path / "nwb"
    code, stdout, err = run_cli(capsys, "export", "--db", db, "--nwb", nwb_dir)
    assert code == 0, err
    files = sorted(nwb_dir.glob("*.nwb"))
    assert len(files) == len(sessions)
    with pynwb.NWBHDF5IO(str(nwb_dir / "sub-alder_ses-001_behavior.nwb"), "r") as io:  # read back with pynwb itself
        nwb = io.read()
        assert nwb.subject.subject_id == "alder" and nwb.subject.species == "Rattus norvegicus"
        assert nwb.subject.sex == "F" and nwb.subject.genotype == "=cmd()"
        trials = nwb.trials.to_dataframe()
        events = nwb.get_events_table("rig_events").to_dataframe()
        first = sessions[0]
        assert int(trials["outcome"].isin(["hit", "miss"]).sum()) == first["trials"]
        assert int((trials["outcome"] == "hit").sum()) == first["hits"]
        assert {"interval_ms", "outcome", "target_ms", "window_low_ms", "window_high_ms", "stage"} <= set(trials)
        presses = events[events["event"] == "lever_down"]["timestamp"].to_numpy()
        # a completed trial's first press is a press time in the events table
        done = trials[trials["outcome"].isin(["hit", "miss"])]
        assert set(done["first_press_time"].round(6)) <= set(presses.round(6))
        assert nwb.session_start_time.isoformat() == first["start"]
    with pynwb.NWBHDF5IO(str(nwb_dir / "sub-alder_ses-002_behavior.nwb"), "r") as io:
        assert "EXCLUDED: @cable loose" in io.read().session_description


def test_decide_records_figures_and_verdict_and_log_verifies(tmp_path, capsys, mock_history):
    out, _ = mock_history
    protocol = tmp_path / "alder.protocol.toml"
    protocol.write_text((out / "alder.protocol.toml").read_text() + ELIGIBILITY)
    db = tmp_path / "store.sqlite3"
    files = sorted(out.glob("alder_s*.rsw"))
    assert run_cli(capsys, "import", *files, "--protocol", protocol, "--db", db)[0] == 0
    report = json.loads(run_cli(capsys, "report", "--db", db, "--animal", "alder", "--json")[1])["animals"][0]
    code, stdout, err = run_cli(capsys, "decide", "--db", db, "--animal", "alder", "--decision", "eligible",
                                "--group", "early", "--operator", "ana", "--reason", "looks ready",
                                "--planned", "muscimol M1", "--planned-date", "2026-03-10")
    assert code == 0, err
    assert "entry 1" in stdout
    row = sqlite3.connect(db).execute("SELECT reason, snapshot, rule_state, disagrees_with_rule, planned_date "
                                      "FROM decisions").fetchone()
    snapshot = json.loads(row[1])
    assert row[0] == "looks ready" and row[4] == "2026-03-10"
    assert snapshot["figures"]["measures"]["hit_rate"] == report["sessions"][-1]["hit_rate"]
    assert snapshot["figures"]["plateau_reached"] == report["plateau"]["reached"]
    assert snapshot["figures"]["slow_status"] == report["consolidation"]["status"] == "too few trials"
    # the rule says what it says; the person's decision is recorded either way, with the disagreement flagged
    plateaued = report["plateau"]["reached"]
    assert row[2] == snapshot["verdict"]["state"]
    assert bool(row[3]) == (not plateaued)
    code, stdout, err = run_cli(capsys, "decide", "--db", db, "--animal", "alder", "--decision", "deferred",
                                "--operator", "bo", "--reason", "wrong animal entered", "--corrects", "1")
    assert code == 0, err
    code, _, err = run_cli(capsys, "decide", "--db", db, "--animal", "alder", "--decision", "deferred",
                           "--operator", "bo", "--reason", "r", "--corrects", "7")
    assert code == 2 and one_line(err) and "--corrects" in err
    assert run_cli(capsys, "log", "verify", "--db", db)[:2] == (0, "2 entries, chain intact\n")
    code, head, _ = run_cli(capsys, "log", "head", "--db", db)
    assert code == 0 and head.startswith("2:")
    assert run_cli(capsys, "log", "verify", "--db", db, "--head", head.strip())[0] == 0
    log_csv = tmp_path / "log.csv"
    assert run_cli(capsys, "log", "export", "--db", db, "--csv", log_csv)[0] == 0
    with open(log_csv, newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert [(r["seq"], r["decision"], r["corrects"]) for r in rows] == [("1", "eligible", ""), ("2", "deferred", "1")]
    before = log_csv.read_bytes()
    with pytest.MonkeyPatch.context() as patch:   # the disk fills up after the header (ENOSPC)
        patch.setattr(csv, "writer", FullDisk)
        code, _, err = run_cli(capsys, "log", "export", "--db", db, "--csv", log_csv)
    assert code == 2 and os.strerror(errno.ENOSPC) in err
    assert log_csv.read_bytes() == before and list(tmp_path.glob("*.part")) == []   # the last export stays whole


def test_corrupt_or_newer_database_is_refused_and_left_untouched(tmp_path, capsys, mock_history):
    out, _ = mock_history
    corrupt = tmp_path / "corrupt.sqlite3"
    corrupt.write_bytes(b"SQLite format 3\x00" + b"\x07" * 4000)
    newer = tmp_path / "newer.sqlite3"
    conn = sqlite3.connect(newer)
    conn.execute("PRAGMA application_id = 1381188657")  # 0x52534431, rigside's id (monitor.store.schema)
    conn.execute("CREATE TABLE t (x)")
    conn.execute("PRAGMA user_version = 99")
    conn.close()
    files = sorted(out.glob("alder_s*.rsw"))[:1]
    for db, why in ((corrupt, "damaged"), (newer, "newer rigside")):
        before = digest(db)
        for args in (["import", *files, "--protocol", out / "alder.protocol.toml"], ["report", "--json"],
                     ["decide", "--animal", "alder", "--decision", "deferred", "--operator", "a", "--reason", "r"]):
            code, _, err = run_cli(capsys, *args, "--db", db)
            assert code == 2 and one_line(err) and why in err and "left unchanged" in err, err
        assert digest(db) == before


HOLD_LOCK = """
import sqlite3, sys, time
conn = sqlite3.connect(sys.argv[1], isolation_level=None)
conn.execute("BEGIN EXCLUSIVE")
print("locked", flush=True)
time.sleep(float(sys.argv[2]))
conn.execute("COMMIT")
open(sys.argv[3], "w").write("released")
"""


def test_import_waits_for_a_lock_held_by_another_process(tmp_path, capsys, mock_history):
    out, _ = mock_history
    db = tmp_path / "store.sqlite3"
    assert import_animal(capsys, db, out, "birch", first=1)[0] == 0  # the file exists at the current version
    released = tmp_path / "released"
    holder = subprocess.Popen([sys.executable, "-c", HOLD_LOCK, str(db), "3", str(released)], stdout=subprocess.PIPE,
                              text=True)
    try:
        assert holder.stdout.readline().strip() == "locked"
        files = sorted(out.glob("alder_s*.rsw"))[:2]
        result = cli("import", *files, "--protocol", out / "alder.protocol.toml", "--db", db)
        assert result.returncode == 0, result.stderr
        assert released.exists()  # the import could only commit after the other process let go
    finally:
        holder.wait(30)
    assert holder.returncode == 0
    assert sqlite3.connect(db).execute("SELECT count(DISTINCT animal) FROM sessions").fetchone()[0] == 2


def test_import_gives_up_with_one_line_when_the_lock_outlasts_wait(tmp_path, capsys, mock_history):
    out, _ = mock_history
    db = tmp_path / "store.sqlite3"
    assert import_animal(capsys, db, out, "birch", first=1)[0] == 0
    released = tmp_path / "released"
    holder = subprocess.Popen([sys.executable, "-c", HOLD_LOCK, str(db), "2", str(released)], stdout=subprocess.PIPE,
                              text=True)
    try:
        assert holder.stdout.readline().strip() == "locked"
        result = cli("import", *sorted(out.glob("alder_s*.rsw"))[:1], "--protocol", out / "alder.protocol.toml",
                     "--db", db, "--wait", "0.2")
        assert result.returncode == 2 and one_line(result.stderr) and "locked" in result.stderr, result.stderr
    finally:
        holder.wait(30)
    assert sqlite3.connect(db).execute("SELECT count(*) FROM sessions WHERE animal = 'alder'").fetchone()[0] == 0


def test_concurrent_decide_processes_each_take_their_own_seq(tmp_path, capsys, mock_history):
    out, _ = mock_history
    db = tmp_path / "store.sqlite3"
    assert import_animal(capsys, db, out, "alder")[0] == 0
    procs = [subprocess.Popen([sys.executable, "-m", "monitor.app", "decide", "--db", str(db), "--animal", "alder",
                               "--decision", "deferred", "--operator", f"op{i}", "--reason", f"reason {i}"],
                              stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True) for i in range(4)]
    for proc in procs:
        _, err = proc.communicate(timeout=120)
        assert proc.returncode == 0, err
    result = cli("log", "verify", "--db", db)
    assert result.returncode == 0 and result.stdout.strip() == "4 entries, chain intact"
    seqs = [r[0] for r in sqlite3.connect(db).execute("SELECT seq FROM decisions ORDER BY id")]
    assert seqs == [1, 2, 3, 4]


def test_full_disk_during_import_stores_nothing_and_says_so(tmp_path, capsys, mock_history, monkeypatch):
    out, _ = mock_history
    db = tmp_path / "store.sqlite3"
    assert import_animal(capsys, db, out, "birch", first=1)[0] == 0
    from monitor.store import db as store_db

    real = store_db.open_store

    def nearly_full(*args, **kwargs):
        conn = real(*args, **kwargs)
        pages = conn.execute("PRAGMA page_count").fetchone()[0]
        conn.execute(f"PRAGMA max_page_count = {pages + 3}")  # SQLITE_FULL without filling the real disk
        return conn

    monkeypatch.setattr(store_db, "open_store", nearly_full)
    code, _, err = import_animal(capsys, db, out, "alder")
    assert code == 2 and one_line(err) and "full" in err and "0 of" in err, err
    monkeypatch.setattr(store_db, "open_store", real)
    conn = sqlite3.connect(db)
    assert conn.execute("SELECT count(*) FROM sessions WHERE animal = 'alder'").fetchone()[0] == 0
    assert conn.execute("SELECT count(*) FROM imports").fetchone()[0] == 1
    conn.close()
    assert import_animal(capsys, db, out, "alder")[0] == 0  # with space again, the same files import


def test_files_stored_by_worker_processes_give_the_same_rows(tmp_path, capsys, mock_history):
    """--jobs 2 (files read and stored side by side by spawned processes, so each session's id is its
    place in the order they were stored) gives row for row the store that --jobs 1 gives: events, raw
    lines, trials, trial builds and the report, each session known by its file and label."""
    out, _ = mock_history
    tables = {"events": "session_id, segment, line, t_us, raw_time, code, value, wall",
              "raw_lines": "session_id, line, byte_offset, kind, reason, raw",
              "trials": "session_id, idx, t_us, interval_ms, outcome, rewarded, computed_outcome",
              "trial_builds": "session_id, trials, counts, water_ul, malformed"}
    seen = []
    for jobs in ("1", "2"):
        db = tmp_path / f"jobs{jobs}.sqlite"
        code, _, err = import_animal(capsys, db, out, "alder", "--no-fit", "--jobs", jobs)
        assert code == 0, err
        with sqlite3.connect(db) as conn:
            known = dict(conn.execute("SELECT s.id, i.path || ' ' || s.label FROM sessions AS s "
                                      "JOIN imports AS i ON i.id = s.import_id"))
            rows = {t: sorted((known[r[0]], *r[1:]) for r in conn.execute(f"SELECT {cols} FROM {t}"))
                    for t, cols in tables.items()}
        report = json.loads(run_cli(capsys, "report", "--db", db, "--json")[1])
        for entry in report["animals"]:
            for session in entry["sessions"]:
                session["session_id"] = known[session["session_id"]]
        seen.append((rows, report))
    assert seen[0][0]["events"] and seen[0][0]["trials"] and len(known) > 2
    assert seen[0] == seen[1]


def test_ctrl_c_during_import_keeps_finished_files_and_names_them(tmp_path, capsys, mock_history, monkeypatch):
    """Ctrl-C while the third file is being stored: that file is rolled back, the two before it stay,
    exit 130 and one line naming how far it got; no traceback."""
    import monitor.store.importer as importer

    out, _ = mock_history
    real = importer.store_parsed
    calls = []

    def interrupted_on_third(conn, parsed, **kwargs):
        calls.append(parsed.path)
        result = real(conn, parsed, **kwargs)
        if len(calls) == 3:
            raise KeyboardInterrupt
        return result

    monkeypatch.setattr(importer, "store_parsed", interrupted_on_third)
    db = tmp_path / "cut.sqlite"
    code, _, err = import_animal(capsys, db, out, "alder", "--no-fit", "--jobs", "1")
    files = sorted(out.glob("alder_s*.rsw"))
    assert code == 130 and "Traceback" not in err
    assert err.strip().splitlines()[-1].startswith(f"interrupted: 2 of {len(files)} files imported "
                                                   f"(the last: {files[1].name})")
    with sqlite3.connect(db) as conn:
        assert [Path(p).name for (p,) in conn.execute("SELECT path FROM imports ORDER BY id")] == \
            [f.name for f in files[:2]]
        assert conn.execute("SELECT count(DISTINCT session_id) FROM events").fetchone()[0] == 2


def test_an_interrupted_import_resumes_with_skip_imported_naming_what_was_skipped(tmp_path, capsys, mock_history):
    out, _ = mock_history
    files = sorted(out.glob("alder_s*.rsw"))[:3]
    db = tmp_path / "resume.sqlite3"
    protocol = out / "alder.protocol.toml"
    code, _, _ = run_cli(capsys, "import", files[0], "--protocol", protocol, "--db", db, "--no-fit")
    assert code == 0  # as if the first command stopped after its first file
    code, _, err = run_cli(capsys, "import", *files, "--protocol", protocol, "--db", db, "--no-fit")
    assert code == 2 and one_line(err) and "--skip-imported" in err
    code, stdout, err = run_cli(capsys, "import", *files, "--protocol", protocol, "--db", db, "--no-fit",
                                "--skip-imported")
    assert code == 0 and f"skipped {files[0]}: already imported" in err and "imported 2 files" in stdout
    conn = sqlite3.connect(db)
    assert conn.execute("SELECT count(*) FROM imports").fetchone()[0] == 3
    conn.close()


def test_skipped_files_name_their_animals_whose_model_is_not_fitted_to_their_data(tmp_path, mock_history):
    from monitor.app.commands.import_files import import_files
    from monitor.app.progress import Progress
    from monitor.store.fits import data_fingerprint, save_fit

    out, _ = mock_history
    alder, birch = sorted(out.glob("alder_s*.rsw"))[:2], sorted(out.glob("birch_s*.rsw"))[:2]
    db = tmp_path / "unfitted.sqlite3"
    protocol = out / "alder.protocol.toml"
    first = import_files(db, [*alder, *birch], protocol, Progress(quiet=True), fit=False)
    assert first.unfitted == () and first.fit_targets == ["alder", "birch"]
    again = import_files(db, [*alder, birch[0]], protocol, Progress(quiet=True), skip_imported=True, fit=False)
    assert again.imported == 0 and again.unfitted == ("alder", "birch") and again.fit_targets == ["alder", "birch"]
    conn = open_store(db)
    with conn:  # a fit of alder's data as they are now: alder no longer needs one
        save_fit(conn, "alder", fingerprint=data_fingerprint(conn, "alder"), params={},
                 block={"session": 2, "estimate": 0.0, "low": 0.0, "high": 1.0, "status": "too few trials"},
                 sessions=[])
    conn.close()
    last = import_files(db, [*alder, *birch], protocol, Progress(quiet=True), skip_imported=True, fit=False)
    assert last.unfitted == ("birch",)


class ImportsMeanwhile:
    """A tracker that, once the first file is stored, has "another process" (its own connection) import the
    command's next file: what a second import of the same files at the same time does."""

    def __init__(self, db: Path, other: Path, protocol: Path) -> None:
        from monitor.app.progress import Progress

        self.quiet, self.db, self.other, self.protocol, self.done = Progress(quiet=True), db, other, protocol, False
        self.lines: list[str] = []

    def begin(self, total: int, unit: str, label: str) -> None: ...

    def advance(self, amount: int = 1) -> None: ...

    def cancelled(self) -> bool:
        return False

    def say(self, line: str) -> None:
        from monitor.store.importer import import_file

        self.lines.append(line)
        if line.startswith("[1/") and not self.done:
            self.done = True
            conn = open_store(self.db)
            with conn:
                import_file(conn, self.other, self.other.read_bytes(), protocol_text=self.protocol.read_text(),
                            protocol_name="other", protocol_version=1)
            conn.close()


@pytest.mark.parametrize("skip", [True, False])
def test_a_file_imported_meanwhile_by_another_process_is_skipped_or_named(tmp_path, mock_history, skip):
    from monitor.app.commands.import_files import import_files
    from monitor.app.errors import UsageError

    out, _ = mock_history
    files = sorted(out.glob("alder_s*.rsw"))[:3]
    db = tmp_path / "meanwhile.sqlite3"
    tracker = ImportsMeanwhile(db, files[1], out / "alder.protocol.toml")
    if skip:
        result = import_files(db, files, out / "alder.protocol.toml", tracker, skip_imported=True)
        assert result.imported == 2 and result.skipped == [files[1]] and result.last == files[2].name
        assert any("skipped alder_s02.rsw: imported meanwhile by another process" in line for line in tracker.lines)
        assert result.summary().startswith("imported 2 files")
    else:
        with pytest.raises(UsageError, match="imported meanwhile by another process; 1 of 3 files imported, the rest "
                                             "not"):
            import_files(db, files, out / "alder.protocol.toml", tracker)
    conn = sqlite3.connect(db)   # plain sqlite3: each file's sessions once
    assert conn.execute("SELECT count(*) FROM imports").fetchone()[0] == (3 if skip else 2)
    assert conn.execute("SELECT count(*) FROM sessions").fetchone()[0] == (3 if skip else 2)
    conn.close()


def _import_skipping(db: str, protocol: str, files: list[str], jobs: str) -> int:
    from monitor.app.cli import main

    return main(["import", *files, "--protocol", protocol, "--db", db, "--no-fit", "--skip-imported", "--quiet",
                 "--jobs", jobs])


@pytest.mark.parametrize("jobs", ["1", "2"])  # 2: four processes storing, two per import
def test_two_imports_of_the_same_files_at_once_with_skip_imported_both_succeed(tmp_path, mock_history, jobs):
    from fixtures.races import together

    out, _ = mock_history
    files = [str(p) for p in sorted(out.glob("alder_s*.rsw"))]
    for attempt in range(3):
        db = tmp_path / f"race{attempt}.sqlite3"
        answers = together(_import_skipping, (str(db), str(out / "alder.protocol.toml"), files, jobs), 2)
        assert answers == [0, 0], answers
        conn = sqlite3.connect(db)   # plain sqlite3: every file once, its events once
        assert conn.execute("SELECT count(*) FROM imports").fetchone()[0] == len(files)
        assert conn.execute("SELECT count(*), count(DISTINCT import_id) FROM sessions").fetchone() == (len(files),) * 2
        conn.close()


@pytest.mark.parametrize("cut,jobs", [("line", "1"), ("mid-line", "1"), ("line", "2")])  # 2: stored by a worker
def test_a_file_imported_while_still_written_and_again_whole_is_stored_once(tmp_path, capsys, mock_history, cut,
                                                                              jobs):
    """The everyday way to double events: an import of the day's folder while one box still writes its log, then
    the folder again. The whole file's session counts; the earlier, cut one is kept but excluded (logged)."""
    out, _ = mock_history
    whole = sorted(out.glob("alder_s*.rsw"))[1].read_bytes()
    lines = whole.splitlines(keepends=True)
    head = b"".join(lines[: len(lines) // 2])
    head += lines[len(lines) // 2][:7] if cut == "mid-line" else b""   # the writer was in the middle of a line
    folder = tmp_path / "rig"
    folder.mkdir()
    growing = folder / "alder_s02.rsw"
    db = tmp_path / "grown.sqlite3"
    protocol = out / "alder.protocol.toml"
    stages = [head[: len(head) // 2], head, whole]   # imported at a third, at a half, then whole
    for data in stages:
        growing.write_bytes(data)
        code, stdout, err = run_cli(capsys, "import", growing, "--protocol", protocol, "--db", db, "--no-fit",
                                    "--jobs", jobs)
        assert code == 0, err
    assert "1 earlier session superseded" in stdout and "the file grew after an earlier import of it" in err
    conn = sqlite3.connect(db)   # plain sqlite3, not the store's code
    rows = conn.execute("SELECT excluded, exclusion_reason FROM sessions ORDER BY id").fetchall()
    assert [r[0] for r in rows] == [1, 1, 0] and all(r[1].startswith("superseded: alder_s02.rsw") for r in rows[:2])
    assert conn.execute("SELECT count(*) FROM session_changes WHERE change = 'excluded'").fetchone()[0] == 2
    counted = conn.execute("SELECT count(*) FROM events AS e JOIN sessions AS s ON s.id = e.session_id "
                           "WHERE s.excluded = 0").fetchone()[0]
    conn.close()
    fresh = tmp_path / "fresh.sqlite3"   # the whole file alone, for comparison
    assert run_cli(capsys, "import", growing, "--protocol", protocol, "--db", fresh, "--no-fit")[0] == 0
    with sqlite3.connect(fresh) as other:
        assert counted == other.execute("SELECT count(*) FROM events").fetchone()[0]
    code, stdout, _ = run_cli(capsys, "report", "--db", db, "--json")
    (animal,) = json.loads(stdout)["animals"]
    assert code == 0 and [s["excluded"] for s in animal["sessions"]] == [True, True, False]   # kept, flagged


def test_a_different_file_of_the_same_name_supersedes_nothing(tmp_path, capsys, mock_history):
    out, _ = mock_history
    first, second = sorted(out.glob("alder_s*.rsw"))[:2]
    db = tmp_path / "names.sqlite3"
    for source, folder in ((first, "a"), (second, "b")):
        (tmp_path / folder).mkdir()
        target = tmp_path / folder / "alder_s01.rsw"
        target.write_bytes(source.read_bytes())
        code, stdout, err = run_cli(capsys, "import", target, "--protocol", out / "alder.protocol.toml", "--db", db,
                                    "--no-fit")
        assert code == 0 and "superseded" not in stdout + err
    with sqlite3.connect(db) as conn:
        assert conn.execute("SELECT sum(excluded), count(*) FROM sessions").fetchone() == (0, 2)


def test_among_files_of_one_name_only_the_grown_ones_beginning_is_superseded(tmp_path, capsys, mock_history):
    """A rig that writes the same file name every day: earlier, shorter files of that name that are not the
    beginning of this one stay counted."""
    out, _ = mock_history
    days = [p.read_bytes() for p in sorted(out.glob("alder_s*.rsw"))[:3]]
    db = tmp_path / "daily.sqlite3"
    shortest = min(days[:2], key=len)
    growing = max(days[2:], key=len)
    stages = [(f"d{i}", data) for i, data in enumerate((shortest, growing[: len(growing) // 3], growing))]
    for folder, data in stages:
        target = tmp_path / folder / "box1.rsw"
        target.parent.mkdir()
        target.write_bytes(data)
        code, _, err = run_cli(capsys, "import", target, "--animal", "alder", "--protocol",
                               out / "alder.protocol.toml", "--db", db, "--no-fit")
        assert code == 0, err
    with sqlite3.connect(db) as conn:   # plain sqlite3: the other day's file counts, the cut one does not
        assert [r[0] for r in conn.execute("SELECT excluded FROM sessions ORDER BY id")] == [0, 1, 0]
