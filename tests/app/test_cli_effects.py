"""`rigside manipulation ...` and `rigside effects` end to end on simulated animals (mock_rig's manipulations):
the stage frozen, the effect against the simulated one, recovery, blinding, one-line errors, the chain."""

from __future__ import annotations

import csv
import json
import sqlite3
from pathlib import Path

import pytest

from mock_rig.history import cohort
from mock_rig.manipulations import write_history
from monitor.app import cli
from fixtures.devices import run_main as rigside

pytestmark = pytest.mark.slow  # a simulated cohort of 16 days imported and fitted: seconds per test

RULE = """
[eligibility]
cohort = "orchard"
blinded = true

[eligibility.groups.early]
plateau = false
min_hit_rate = 0.0

[eligibility.groups.late]
plateau = false
min_hit_rate = 0.0
"""
PLANS = {"alder": {10: "inactivate_fast", 12: "vehicle"}, "birch": {9: "lesion_fast"}}


@pytest.fixture(scope="module")
def store(tmp_path_factory) -> tuple[Path, dict]:
    out = tmp_path_factory.mktemp("manipulated")
    truth = write_history(out, cohort(2, seed=3), days=16, plans=PLANS)
    db = out / "store.sqlite3"
    for animal in ("alder", "birch"):
        protocol = out / f"{animal}.protocol.toml"
        protocol.write_text(protocol.read_text() + RULE)
        assert cli.main(["import", *map(str, sorted(out.glob(f"{animal}_s*.rsw"))), "--protocol", str(protocol),
                         "--db", str(db)]) == 0
        assert cli.main(["assign", "--animal", animal, "--operator", "kim", "--reason", "plan", "--db", str(db)]) == 0
    return db, truth


@pytest.fixture(scope="module")
def recorded(store) -> tuple[Path, dict, list[str]]:
    db, truth = store
    outs = []
    for args in (("--animal", "alder", "--acute", "--what", "muscimol M1", "--session", 10, "--control-session", 12,
                  "--time", "2026-02-13T10:30:00+01:00"),
                 ("--animal", "alder", "--acute", "--control", "--what", "saline M1", "--session", 12),
                 ("--animal", "birch", "--lasting", "--what", "M1 lesion", "--session", 9)):
        code = cli.main(["manipulation", "add", *map(str, args), "--operator", "kim", "--reason", "as planned",
                         "--db", str(db)])
        assert code == 0
    return db, truth, outs


def _effects(capsys, db, *extra) -> dict:
    code, out, err = rigside(capsys, "effects", "--db", db, "--json", *extra)
    assert code == 0, err
    return json.loads(out)


def _true_effect(truth: dict, animal: str, session: int, baseline: list[int]) -> float:
    rates = {s["index"]: s["expected_hit_rate"] for s in truth["animals"][animal]["sessions"]}
    return rates[session] - sum(rates[i] for i in baseline) / len(baseline)


def test_effects_match_the_simulated_ones(capsys, recorded):
    db, truth, _ = recorded
    result = _effects(capsys, db)
    rows = {(r["animal"], r["role"]): r for r in result["manipulations"]}
    test = rows[("alder", "test")]
    eff = test["effect"]
    assert eff["baseline_sessions"] == [7, 8, 9]            # the last 3 final-stage sessions before session 10
    hit = eff["vs_baseline"]["hit_rate"]
    assert hit["high"] < 0                                  # removing the fast state's part costs hits
    assert hit["low"] <= _true_effect(truth, "alder", 10, [7, 8, 9]) <= hit["high"]
    assert eff["vs_control"]["hit_rate"]["high"] < 0 and eff["control_session"] == 12
    against_control = result["groups_vs_control"]["hit_rate"]
    assert [(g["role"], g["n"]) for g in against_control] == [("test", 1)]
    assert against_control[0]["mean"] == pytest.approx(eff["vs_control"]["hit_rate"]["effect"])
    control = rows[("alder", "control")]["effect"]
    # the vehicle session's baseline skips session 10 (manipulated): 8, 9, 11
    assert control["baseline_sessions"] == [8, 9, 11]
    c = control["vs_baseline"]["hit_rate"]
    se = (c["high"] - c["low"]) / (2 * 1.96)
    # one animal: within 3 standard errors (99.7 % of a normal law); coverage over a cohort is
    # tests/core/test_effects_simulated.py's job. This animal still learns: the truth is not 0.
    assert abs(c["effect"] - _true_effect(truth, "alder", 12, [8, 9, 11])) < 3 * se
    assert abs(c["effect"]) < abs(hit["effect"]) / 3
    lesion = rows[("birch", "test")]["effect"]
    assert lesion["vs_baseline"]["hit_rate"]["high"] < 0
    # the simulated lesion takes the fast state for good (no error-driven slow learning): no recovery
    assert lesion["recovery"] == {"measure": "hit_rate", "recovered": False, "sessions": None, "session": None,
                                  "followed": 4}
    assert "not a" not in result["advisory"] and "veterinarian" in result["advisory"]


def test_the_stage_is_frozen_at_the_last_session_before(capsys, recorded):
    db, truth, _ = recorded
    result = _effects(capsys, db)
    test = next(r for r in result["manipulations"] if r["animal"] == "alder" and r["role"] == "test")
    stage = test["stage"]
    assert test["time"] == "2026-02-13T10:30:00+01:00"
    assert stage["session"] == 9 and stage["slow_status"] is not None
    assert 0 <= stage["slow_low"] <= stage["slow_estimate"] <= stage["slow_high"] <= 1
    conn = sqlite3.connect(db)
    try:
        excluded = [r[0] for r in conn.execute("SELECT excluded FROM sessions WHERE animal = 'alder' "
                                               "ORDER BY started_at")]
        with pytest.raises(sqlite3.DatabaseError, match="append-only"):
            conn.execute("UPDATE manipulations SET what = 'x'")
    finally:
        conn.close()
    assert [i + 1 for i, x in enumerate(excluded) if x] == [10, 12]   # kept out of curves and fits


def test_groups_are_codes_until_the_cohort_is_unblinded(capsys, recorded, tmp_path):
    db, _, _ = recorded
    before = _effects(capsys, db)
    assert {r["group_shown_as"] for r in before["manipulations"]} == {"code"}
    assert all(r["group"].startswith("G-") for r in before["manipulations"])
    assert "early" not in json.dumps(before["groups"]) and "late" not in json.dumps(before["groups"])
    copy = tmp_path / "copy.sqlite3"        # a copy without the key file beside it stays blinded after unblinding
    code, _, err = rigside(capsys, "manipulation", "unblind", "--cohort", "orchard", "--operator", "kim",
                           "--reason", "analysis done", "--db", db)
    assert code == 0 and "unblinded" in err
    after = _effects(capsys, db, "--cohort", "orchard")
    assert {r["group"] for r in after["manipulations"]} <= {"early", "late"}
    assert after["unblinded"] == ["orchard"]
    copy.write_bytes(Path(db).read_bytes())
    assert {r["group_shown_as"] for r in _effects(capsys, copy)["manipulations"]} == {"code"}
    code, _, err = rigside(capsys, "manipulation", "unblind", "--cohort", "orchard", "--operator", "kim",
                           "--reason", "again", "--db", db)
    assert code == 2 and len(err.strip().splitlines()) == 1


def test_csv_has_a_row_per_manipulation_and_measure(capsys, recorded, tmp_path):
    db, _, _ = recorded
    out = tmp_path / "effects.csv"
    code, _, err = rigside(capsys, "effects", "--db", db, "--csv", out)
    assert code == 0, err
    rows = list(csv.DictReader(out.open()))
    assert len(rows) == 3 * 5
    first = rows[0]
    assert float(first["baseline_range_low"]) <= float(first["baseline"]) <= float(first["baseline_range_high"])
    assert {r["measure"] for r in rows} == {"hit_rate", "interval_error", "cv", "premature_rate",
                                            "trials_per_minute"}
    code, printed, _ = rigside(capsys, "effects", "--db", db, "--cohort", "orchard", "--csv")   # stdout
    assert code == 0 and list(csv.DictReader(printed.splitlines())) == rows


def test_bad_input_is_one_line_and_writes_nothing(capsys, recorded):
    db, _, _ = recorded
    before = sqlite3.connect(db).execute("SELECT count(*) FROM manipulations").fetchone()[0]
    for args, option in ((("--animal", "alder", "--acute", "--session", 99), "--session"),
                         (("--animal", "nobody", "--acute", "--session", 1), "--animal"),
                         (("--animal", "alder", "--lasting", "--session", 5, "--control-session", 4),
                          "--control-session"),
                         (("--animal", "alder", "--acute", "--session", 5, "--time", "yesterday"), "--time")):
        code, _, err = rigside(capsys, "manipulation", "add", *args, "--what", "x", "--operator", "kim",
                               "--reason", "r", "--db", db)
        assert code == 2 and len(err.strip().splitlines()) == 1 and option in err, err
    code, _, err = rigside(capsys, "effects", "--db", db, "--json", "--cohort", "nowhere")
    assert code == 2 and "--cohort" in err and len(err.strip().splitlines()) == 1
    assert sqlite3.connect(db).execute("SELECT count(*) FROM manipulations").fetchone()[0] == before


def test_list_verifies_the_chain_and_withdraw_appends(capsys, recorded, tmp_path):
    db, _, _ = recorded
    code, out, _ = rigside(capsys, "manipulation", "list", "--db", db, "--json")
    assert code == 0 and json.loads(out)["chain"] == "ok" and len(json.loads(out)["entries"]) == 3
    spare = tmp_path / "spare.sqlite3"          # withdraw on a copy: the other tests keep every entry
    spare.write_bytes(Path(db).read_bytes())
    copy = tmp_path / "tampered.sqlite3"
    copy.write_bytes(Path(db).read_bytes())
    conn = sqlite3.connect(copy)
    conn.execute("DROP TRIGGER manipulations_no_update")
    conn.execute("UPDATE manipulations SET what = 'saline' WHERE seq = 1")
    conn.commit()
    conn.close()
    code, out, err = rigside(capsys, "manipulation", "list", "--db", copy)
    assert code == 1 and "entry 1" in err and len(err.strip().splitlines()) == 1
    code, out, err = rigside(capsys, "manipulation", "withdraw", "--seq", 2, "--operator", "kim", "--reason",
                             "wrong day", "--db", spare)
    assert code == 0, err
    result = _effects(capsys, spare)
    assert [r["role"] for r in result["manipulations"] if r["animal"] == "alder"] == ["test"]
    code, out, err = rigside(capsys, "manipulation", "withdraw", "--seq", 4, "--operator", "kim", "--reason",
                             "twice", "--db", spare)
    assert code == 2 and "--seq" in err


def test_nwb_carries_the_manipulations_as_a_session_table(capsys, recorded, tmp_path):
    pynwb = pytest.importorskip("pynwb")
    from monitor.store.nwb_export import file_name

    db, _, _ = recorded
    code, _, err = rigside(capsys, "export", "--db", db, "--nwb", tmp_path)
    assert code == 0, err
    with pynwb.NWBHDF5IO(str(tmp_path / file_name("alder", 10)), "r") as io:   # read back with pynwb
        nwb = io.read()
        table = nwb.processing["behavior"]["manipulations"].to_dataframe()
        assert list(table["what"]) == ["muscimol M1"] and list(table["duration"]) == ["acute"]
        assert table["group"].iloc[0].startswith("G-") and table["stage_session"].iloc[0] == 9
        assert "start_time" not in table and "manipulations" not in nwb.intervals  # the session's, not a span's
    with pynwb.NWBHDF5IO(str(tmp_path / file_name("alder", 12)), "r") as io:
        table = io.read().processing["behavior"]["manipulations"].to_dataframe()
        assert sorted(table["role"]) == ["control", "control session of"]
    with pynwb.NWBHDF5IO(str(tmp_path / file_name("alder", 9)), "r") as io:
        assert "behavior" not in io.read().processing
