"""NWB files as a public archive takes them: the community's own checker (nwbinspector, DANDI configuration) and
pynwb read every exported file; names, subject, session metadata, trial spans against the rig's own events,
compression, and an export that writes the rest when one session fails."""

from __future__ import annotations

import shlex
from pathlib import Path

import pytest

from mock_rig.history import cohort, write_history
from monitor.store import care_log, registry
from monitor.store.db import open_store
from fixtures.devices import run_main as run_cli

pynwb = pytest.importorskip("pynwb")
nwbinspector = pytest.importorskip("nwbinspector")
h5py = pytest.importorskip("h5py")

SETTINGS = """
[export]
institution = "University of Somewhere"
lab = "Timing Lab"
keywords = ["motor timing", "operant conditioning"]
"""


@pytest.fixture(scope="module")
def history(tmp_path_factory) -> tuple[Path, dict]:
    out = tmp_path_factory.mktemp("history")
    return out, write_history(out, cohort(2, seed=1), days=3)


def imported(capsys, tmp_path: Path, out: Path) -> Path:
    db = tmp_path / "store.sqlite3"
    for animal in ("alder", "birch"):
        files = sorted(out.glob(f"{animal}_s*.rsw"))
        code, _, err = run_cli(capsys, "import", *files, "--protocol", out / f"{animal}.protocol.toml", "--db", db,
                               "--no-fit")
        assert code == 0, err
    return db


def run_animal_script(capsys, script: Path, db: Path, only: str) -> None:
    """The `rigside animal add` lines of the simulator's animals.sh, for one animal, through the CLI."""
    for line in script.read_text().splitlines():
        words = shlex.split(line) if line.startswith("rigside ") else []
        if words[:3] == ["rigside", "animal", "add"] and words[3] == only:
            words = [str(db) if w == "$DB" else w for w in words[1:]]
            assert run_cli(capsys, *words)[0] == 0


def inspector_levels(path: Path) -> set[str]:
    """Importance names of every message of nwbinspector with the DANDI configuration (the outside checker)."""
    config = nwbinspector.load_config(filepath_or_keyword="dandi")
    return {m.importance.name for m in nwbinspector.inspect_nwbfile(nwbfile_path=str(path), config=config)}


@pytest.mark.slow  # the NWB checker over every exported file
def test_complete_records_pass_the_dandi_checker_and_carry_subject_session_and_trials(tmp_path, capsys, history):
    out, truth = history
    db = imported(capsys, tmp_path, out)
    run_animal_script(capsys, out / "animals.sh", db, "alder")
    conn = open_store(db)
    alder = conn.execute("SELECT id FROM animals WHERE name = 'alder'").fetchone()[0]
    first, second = [r[0] for r in conn.execute("SELECT id FROM sessions WHERE animal = 'alder' ORDER BY started_at")][:2]
    conn.execute("INSERT INTO checkins (session_id, animal_id, rig, operator, weight_before_g, checked_in_at) "
                 "VALUES (?, ?, 'box1', 'Rivera, Ana', 312, 0)", (first, alder))
    day = conn.execute("SELECT start_wall FROM sessions WHERE id = ?", (second,)).fetchone()[0][:10]
    care_log.add_weighing(conn, "alder", at=f"{day}T18:00:00+01:00", grams=318.5, by="Kim, Bo")
    conn.commit()
    conn.close()
    settings = tmp_path / "settings.toml"
    settings.write_text(SETTINGS)

    code, stdout, err = run_cli(capsys, "export", "--db", db, "--nwb", tmp_path / "nwb", "--settings", settings)
    assert code == 0, err
    warnings = [line for line in err.splitlines() if "warning" in line]
    # one line per incomplete animal, naming what is missing; none for the complete one
    assert len(warnings) == 1 and "birch" in warnings[0]
    assert all(f in warnings[0] for f in ("species", "sex", "date_of_birth or age", "strain", "genotype"))
    names = sorted(p.name for p in (tmp_path / "nwb").iterdir())
    assert names == [f"sub-{a}_ses-{n:03d}_behavior.nwb" for a in ("alder", "birch") for n in (1, 2, 3)]

    for n in (1, 2, 3):  # nwbinspector 0.7.2 --config dandi: the archive's own checker
        levels = inspector_levels(tmp_path / "nwb" / f"sub-alder_ses-{n:03d}_behavior.nwb")
        assert levels <= {"BEST_PRACTICE_SUGGESTION"}, levels  # no error, validation failure, critical, violation
    # the same checker does see an incomplete record (so the check above can fail)
    assert "CRITICAL" in inspector_levels(tmp_path / "nwb" / "sub-birch_ses-001_behavior.nwb")

    rsw = sorted(out.glob("alder_s*.rsw"))
    for n in (1, 2):
        with pynwb.NWBHDF5IO(str(tmp_path / "nwb" / f"sub-alder_ses-{n:03d}_behavior.nwb"), "r") as io:
            nwb = io.read()
            s = nwb.subject
            assert (s.subject_id, s.species, s.sex, s.strain, s.genotype) == (
                "alder", "Rattus norvegicus", "F", "Long-Evans", "wild type")
            born = s.date_of_birth.date()
            assert s.age == f"P{(nwb.session_start_time.date() - born).days}D"  # ISO 8601 duration in days
            assert s.weight == ("0.312 kg" if n == 1 else "0.3185 kg")
            assert list(nwb.experimenter or []) == (["Rivera, Ana"] if n == 1 else [])
            assert (nwb.institution, nwb.lab, nwb.session_id) == ("University of Somewhere", "Timing Lab", f"{n:03d}")
            assert list(nwb.keywords[:]) == ["motor timing", "operant conditioning"]
            assert "version" in nwb.protocol and nwb.session_description
            trials = nwb.trials.to_dataframe()
            events = nwb.get_events_table("rig_events").to_dataframe()
            expected = truth["animals"]["alder"]["sessions"][n - 1]
            assert int(trials["outcome"].isin(["hit", "miss"]).sum()) == expected["trials"]
            assert int((trials["outcome"] == "hit").sum()) == expected["hits"]
            assert (trials["stop_time"] > trials["start_time"]).all()
            assert (trials["start_time"] <= trials["first_press_time"] + 1e-9).all()
            # the rig frames its trials: each row runs from one of its trial_start lines to one of its outcome lines
            starts = set(events.loc[events["event"] == "trial_start", "timestamp"].round(6))
            ends = set(events.loc[events["event"] == "outcome", "timestamp"].round(6))
            assert set(trials["start_time"].round(6)) <= starts
            assert set(trials.loc[trials["outcome_source"] == "rig", "stop_time"].round(6)) <= ends
            # the event words, decoded from the categorical column, are the file's own lines
            lines = [ln.split()[1] for ln in rsw[n - 1].read_text().splitlines() if not ln.startswith("#")]
            assert list(events["event"]) == lines
        with h5py.File(tmp_path / "nwb" / f"sub-alder_ses-{n:03d}_behavior.nwb") as f:  # compression, per h5py
            assert f["events/rig_events/timestamp"].compression == "gzip"
            assert f["intervals/trials/start_time"].compression == "gzip"
            assert f["events/rig_events/event"].dtype.kind == "u"  # word codes, each word stored once


NUL_SESSION = ("# rigside-wire 1 clock=us wrap=32 fw=x start=2026-03-28T09:00:00+01:00\n"
               "1000 session_start\n2000 note cable\x00 swapped\n3000 session_end\n")


def test_zero_trial_session_nul_note_and_a_failed_session(tmp_path, capsys, history):
    out, _ = history
    db = imported(capsys, tmp_path, out)
    quiet = tmp_path / "cedar_s01.rsw"
    quiet.write_bytes(NUL_SESSION.encode("ascii"))
    assert run_cli(capsys, "import", quiet, "--protocol", out / "alder.protocol.toml", "--db", db, "--no-fit")[0] == 0
    conn = open_store(db)
    protocol = conn.execute("SELECT protocol_id FROM sessions WHERE protocol_id IS NOT NULL").fetchone()[0]
    registry.check_in(conn, animal="dove", rig="box2", operator="Rivera, Ana", protocol_id=protocol,
                     weight_before_g=290.0)  # checked in, nothing recorded: no events at all
    broken = conn.execute("SELECT id FROM sessions WHERE animal = 'birch' ORDER BY started_at").fetchall()[1][0]
    conn.execute("UPDATE sessions SET start_wall = 'not a time' WHERE id = ?", (broken,))
    conn.commit()
    conn.close()

    code, stdout, err = run_cli(capsys, "export", "--db", db, "--nwb", tmp_path / "nwb")
    assert code == 1
    errors = [line for line in err.splitlines() if "error" in line]
    assert len(errors) == 1 and "birch session 2" in errors[0]
    names = sorted(p.name for p in (tmp_path / "nwb").iterdir())  # nothing half-written is left behind
    assert "sub-birch_ses-002_behavior.nwb" not in names and len(names) == 7 and all(n.endswith(".nwb") for n in names)
    with pynwb.NWBHDF5IO(str(tmp_path / "nwb" / "sub-dove_ses-001_behavior.nwb"), "r") as io:
        nwb = io.read()
        assert list(nwb.experimenter) == ["Rivera, Ana"] and nwb.subject.weight == "0.29 kg"
        assert nwb.trials is None and not nwb.events
    with pynwb.NWBHDF5IO(str(tmp_path / "nwb" / "sub-cedar_ses-001_behavior.nwb"), "r") as io:
        nwb = io.read()
        assert nwb.trials is None  # no trials: no empty table
        events = nwb.get_events_table("rig_events").to_dataframe()
        assert list(events["value"]) == ["", "cable\\x00 swapped", ""]


def test_rewritten_export_replaces_files_whole(tmp_path, capsys, history):
    out, _ = history
    db = imported(capsys, tmp_path, out)
    target = tmp_path / "nwb"
    assert run_cli(capsys, "export", "--db", db, "--nwb", target)[0] == 0
    first = {p.name: p.stat().st_size for p in target.iterdir()}
    run_animal_script(capsys, out / "animals.sh", db, "birch")
    code, _, err = run_cli(capsys, "export", "--db", db, "--nwb", target)
    assert code == 0 and "warning: birch" not in err
    assert set(first) == {p.name for p in target.iterdir()}
    with pynwb.NWBHDF5IO(str(target / "sub-birch_ses-001_behavior.nwb"), "r") as io:
        assert io.read().subject.species == "Rattus norvegicus"


def test_a_rig_without_outcomes_still_gives_spans_the_checker_accepts(tmp_path, capsys):
    """Older firmware sends no outcome: lone presses end when the protocol stops waiting (its trial_timeout_ms)."""
    import tomllib

    out = tmp_path / "h"
    write_history(out, cohort(1, seed=4, legacy=True), days=1)
    db = tmp_path / "store.sqlite3"
    protocol = out / "alder.protocol.toml"
    assert run_cli(capsys, "import", *sorted(out.glob("alder_s*.rsw")), "--protocol", protocol, "--db", db,
                   "--no-fit")[0] == 0
    run_animal_script(capsys, out / "animals.sh", db, "alder")
    assert run_cli(capsys, "export", "--db", db, "--nwb", tmp_path / "nwb")[0] == 0
    path = tmp_path / "nwb" / "sub-alder_ses-001_behavior.nwb"
    levels = inspector_levels(path)  # nwbinspector, DANDI configuration
    assert levels <= {"BEST_PRACTICE_SUGGESTION"}, levels
    document = tomllib.loads(protocol.read_text())  # the protocol file as written, read by tomllib
    stages = {s["name"]: s for s in document.get("stages", [])}
    with pynwb.NWBHDF5IO(str(path), "r") as io:
        trials = io.read().trials.to_dataframe()
    assert (trials["outcome_source"] == "computed").all() and (trials["stop_time"] > trials["start_time"]).all()
    lone = trials[trials["outcome"] == "lone"]
    assert len(lone) > 0
    for _, row in lone.iterrows():
        stage = stages.get(row["stage"], {})
        # docs/protocol.md: a stage's timeout, else [protocol] trial_timeout_ms, else 3 x the target
        timeout_ms = stage.get("trial_timeout_ms", document["protocol"].get("trial_timeout_ms", 3 * row["target_ms"]))
        timeout_s = timeout_ms / 1000
        assert row["stop_time"] - row["first_press_time"] == pytest.approx(timeout_s, abs=2e-6)


def test_two_names_that_give_one_file_name_are_not_mixed(tmp_path):
    from monitor.store.nwb_export import export_nwb

    conn = open_store(tmp_path / "store.sqlite3")
    for animal in ("oak 1", "oak-1"):  # both would be sub-oak-1 (DANDI labels: letters, digits, "-")
        registry.check_in(conn, animal=animal, rig="box1", operator="Kim, Bo", protocol_id=None)
    result = export_nwb(conn, tmp_path / "nwb")
    conn.close()
    assert [p.name for p in result.written] == ["sub-oak-1_ses-001_behavior.nwb"]
    assert len(result.failed) == 1 and result.failed[0].startswith("oak-1 session 1")
    with pynwb.NWBHDF5IO(str(result.written[0]), "r") as io:
        assert "rigside name oak 1" in io.read().subject.description


@pytest.mark.slow  # three sessions imported, three manipulations recorded, the NWB checker over two files
def test_sessions_with_several_manipulations_carry_them_in_a_table_the_checker_accepts(tmp_path, capsys):
    """Two and three manipulations in force: a plain table in the behavior module, one row each, every column."""
    from monitor.store.nwb_manipulations import COLUMNS

    out = tmp_path / "h"
    write_history(out, cohort(1, seed=5), days=3)
    db = tmp_path / "store.sqlite3"
    assert run_cli(capsys, "import", *sorted(out.glob("alder_s*.rsw")), "--protocol", out / "alder.protocol.toml",
                   "--db", db, "--no-fit")[0] == 0
    run_animal_script(capsys, out / "animals.sh", db, "alder")
    added = [("--acute", "--what", "muscimol M1", "--session", "2", "--control-session", "3"),
             ("--acute", "--control", "--what", "saline M1", "--session", "3"),
             ("--lasting", "--what", "M1 lesion", "--session", "2", "--group", "lesion")]
    for args in added:
        code, _, err = run_cli(capsys, "manipulation", "add", "--animal", "alder", *args, "--operator", "Kim, Bo",
                               "--reason", "as planned", "--db", db)
        assert code == 0, err
    assert run_cli(capsys, "export", "--db", db, "--nwb", tmp_path / "nwb")[0] == 0
    # the log numbers its entries 1, 2, 3 in the order recorded; what each session is to each, as recorded above
    expected = {2: {(1, "muscimol M1", "acute", "test"), (3, "M1 lesion", "lasting", "test")},
                3: {(1, "muscimol M1", "acute", "control session of"), (2, "saline M1", "acute", "control"),
                    (3, "M1 lesion", "lasting", "test")}}
    for n, rows in expected.items():
        path = tmp_path / "nwb" / f"sub-alder_ses-{n:03d}_behavior.nwb"
        levels = inspector_levels(path)  # nwbinspector, DANDI configuration: the outside checker
        assert levels <= {"BEST_PRACTICE_SUGGESTION"}, levels  # nothing critical, no violation
        with pynwb.NWBHDF5IO(str(path), "r") as io:  # read back with pynwb
            nwb = io.read()
            assert "manipulations" not in nwb.intervals
            table = nwb.processing["behavior"]["manipulations"]
            assert type(table).__name__ == "DynamicTable"
            frame = table.to_dataframe()
        assert list(frame.columns) == [name for name, _ in COLUMNS]
        assert set(zip(frame["seq"], frame["what"], frame["duration"], frame["role"])) == rows
        assert len(frame) == len(rows)
        assert set(frame["group"]) >= {"lesion"} and (frame["first_session"] > 0).all()
        assert set(frame["stage_session"]) <= {-1, *range(1, 4)}
    with pynwb.NWBHDF5IO(str(tmp_path / "nwb" / "sub-alder_ses-001_behavior.nwb"), "r") as io:
        assert "behavior" not in io.read().processing  # no manipulation in force: no table
    # the same rows as intervals each spanning the session are what the checker calls CRITICAL (nwbinspector)
    spanning = pynwb.epoch.TimeIntervals(name="manipulations", description="each row spans the session")
    for _ in range(len(frame)):
        spanning.add_row(start_time=0.0, stop_time=60.0)
    message = nwbinspector.checks.check_time_intervals_start_time_not_constant(spanning)
    assert message is not None and message.importance.name == "CRITICAL"
