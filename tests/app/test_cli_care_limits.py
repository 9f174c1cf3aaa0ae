"""Care records that no animal gives are refused or need a reason; entries are voided or corrected by new
entries; the care log is append-only and hash-chained; `care` works for every animal in the store."""

from __future__ import annotations

import sqlite3
from datetime import datetime, timedelta

import pytest

from monitor.app.cli import main
from monitor.core.care.limits import RODENT, limits_for, weighing_concerns
from monitor.store import db as store_db
from monitor.store.db import open_store
from monitor.store.registry import ensure_animal


def care(capsys, *args) -> tuple[int, str, str]:
    code = main(["care", *map(str, args)])
    out = capsys.readouterr()
    return code, out.out, out.err


@pytest.fixture
def rat(tmp_path):
    path = tmp_path / "store.sqlite3"
    conn = open_store(path)
    ensure_animal(conn, "heron", species="Rattus norvegicus", baseline_weight_g=320.0)
    conn.close()
    return path


def at(days_ago: float) -> str:
    return (datetime.now().astimezone() - timedelta(days=days_ago)).isoformat(timespec="seconds")


def test_species_names_and_bounds():
    # adult rats weigh ~150-800 g, mice ~15-45 g (from memory: laboratory animal references)
    assert limits_for("Rattus norvegicus").species == limits_for("rat").species == "rat"
    assert limits_for(" Mus  musculus ").species == "mouse" and limits_for(None) is RODENT
    now = datetime.now().astimezone()
    assert weighing_concerns(25_000, limits_for("rat"), now)[0].refused
    assert not weighing_concerns(320, limits_for("rat"), now, (now - timedelta(days=1), 300))


def test_a_weight_no_rat_has_is_refused_and_a_far_jump_needs_a_reason(rat, capsys):
    assert care(capsys, "weigh", "--db", rat, "--animal", "heron", "--grams", 250, "--by", "ana", "--at", at(1))[0] == 0
    code, _, err = care(capsys, "weigh", "--db", rat, "--animal", "heron", "--grams", 25000, "--by", "ana")
    assert code == 2 and "no rat weighs that" in err and len(err.strip().splitlines()) == 1
    code, _, err = care(capsys, "weigh", "--db", rat, "--animal", "heron", "--grams", 500, "--by", "ana")
    assert code == 2 and "2.00 times the last weighing (250 g" in err and "--confirm" in err
    code, _, _ = care(capsys, "weigh", "--db", rat, "--animal", "heron", "--grams", 500, "--by", "ana",
                      "--confirm", "weighed twice, scale checked with a 500 g weight")
    assert code == 0
    code, _, err = care(capsys, "supplement", "--db", rat, "--animal", "heron", "--ml", 50, "--by", "ana")
    assert code == 2 and "more than the usual 15 ml" in err
    code, _, err = care(capsys, "supplement", "--db", rat, "--animal", "heron", "--ml", 500, "--by", "ana",
                        "--confirm", "really")
    assert code == 2 and "no single supplement" in err  # refused whatever the reason
    code, out, _ = care(capsys, "list", "--db", rat, "--animal", "heron")
    assert "500 g by ana [confirmed: weighed twice" in out and out.count("\n") == 2


def test_void_and_correct_keep_the_original_and_change_the_ledger(rat, capsys):
    care(capsys, "weigh", "--db", rat, "--animal", "heron", "--grams", 250, "--by", "ana", "--at", at(0.01))
    code, out, _ = care(capsys, "sheet", "--db", rat, "--animal", "heron")
    assert "250.0 g (78.1 % of baseline)" in out and "ALERT" in out  # below 80 % of 320 g
    code, _, err = care(capsys, "correct", "--db", rat, "--entry", 1, "--grams", 300, "--by", "ben")
    assert code == 2 and "--reason" in err
    code, out, _ = care(capsys, "correct", "--db", rat, "--entry", 1, "--grams", 300, "--by", "ben",
                        "--reason", "typed 250 for 300")
    assert code == 0 and "corrected by entry 2" in out
    assert "300.0 g (93.8 % of baseline)" in care(capsys, "sheet", "--db", rat, "--animal", "heron")[1]
    code, _, err = care(capsys, "void", "--db", rat, "--entry", 1, "--by", "ben", "--reason", "again")
    assert code == 2 and "already corrected by entry 2" in err
    assert care(capsys, "void", "--db", rat, "--entry", 2, "--by", "ben", "--reason", "wrong animal")[0] == 0
    assert "no weight" in care(capsys, "sheet", "--db", rat, "--animal", "heron")[1]
    listed = care(capsys, "list", "--db", rat, "--animal", "heron")[1].splitlines()
    assert len(listed) == 3 and all("(not counted)" in line for line in listed)
    assert "[void of 2: wrong animal]" in listed[2]


def test_the_care_log_refuses_edits_and_log_verify_finds_a_forced_one(rat, tmp_path, capsys):
    care(capsys, "weigh", "--db", rat, "--animal", "heron", "--grams", 300, "--by", "ana", "--at", at(1))
    care(capsys, "note", "--db", rat, "--animal", "heron", "--text", "bright, alert", "--by", "ana")
    assert main(["log", "verify", "--db", str(rat)]) == 0
    assert "2 care entries, chain intact" in capsys.readouterr().out
    conn = sqlite3.connect(rat)
    with pytest.raises(sqlite3.IntegrityError, match="append-only"):
        conn.execute("UPDATE care_log SET amount = 250 WHERE id = 1")
    conn.execute("DROP TRIGGER care_log_no_update")  # what someone editing the file by hand could do
    conn.execute("UPDATE care_log SET amount = 250 WHERE id = 1")
    conn.commit()
    conn.close()
    assert main(["log", "verify", "--db", str(rat)]) == 1
    err = capsys.readouterr().err
    assert "care entry 1" in err and "changed" in err and len(err.strip().splitlines()) == 1


def test_the_care_sheet_covers_an_animal_known_only_from_its_sessions(tmp_path, capsys):
    path = tmp_path / "store.sqlite3"
    conn = open_store(path)
    source = store_db.register_source(conn, "file", "/x.rsw", "box1")
    protocol = '[protocol]\nname = "p"\nversion = 1\ntask = "two_press"\ntarget_ms = 650\ntolerance = 0.2\n'
    store_db.start_session(conn, source, "zed", "box1", "p", 1, protocol)  # as an older recorder left it
    conn.close()
    code, out, err = care(capsys, "sheet", "--db", path)
    assert code == 0, err
    assert out.startswith("zed ")


def test_a_protocol_narrows_the_usual_ranges_for_its_animals(tmp_path, capsys):
    from monitor.core.protocol import parse_protocol

    protocol = ('[protocol]\nname = "p"\nversion = 1\ntask = "two_press"\ntarget_ms = 650\ntolerance = 0.2\n'
                '[care_limits]\nweight_g = [250, 450]\nmax_supplement_ml = 8\nmax_reward_ul = 60\n')
    assert parse_protocol(protocol).care_limits == {"weight_g": (250.0, 450.0), "max_supplement_ml": 8.0,
                                                    "max_reward_ul": 60.0}
    path = tmp_path / "store.sqlite3"
    conn = open_store(path)
    ensure_animal(conn, "heron", species="rat")
    source = store_db.register_source(conn, "file", "/x.rsw", "box1")
    store_db.start_session(conn, source, "heron", "box1", "p", 1, protocol)
    conn.close()
    code, _, err = care(capsys, "weigh", "--db", path, "--animal", "heron", "--grams", 200, "--by", "ana")
    assert code == 2 and "usual 250-450 g of a rat under this protocol" in err  # the rat's own range allows 200
    code, _, err = care(capsys, "supplement", "--db", path, "--animal", "heron", "--ml", 10, "--by", "ana")
    assert code == 2 and "usual 8 ml" in err
    assert care(capsys, "supplement", "--db", path, "--animal", "heron", "--ml", 6, "--by", "ana")[0] == 0


@pytest.mark.parametrize("table, key", [("weight_g = [450, 250]", "weight_g"),
                                        ("max_supplement_ml = -1", "max_supplement_ml"), ("max_reward = 3", "max_reward")])
def test_a_bad_care_limits_table_names_its_key(table, key):
    from drivers.config import ConfigError
    from monitor.core.protocol import parse_protocol

    text = ('[protocol]\nname = "p"\nversion = 1\ntask = "two_press"\ntarget_ms = 650\ntolerance = 0.2\n'
            f'[care_limits]\n{table}\n')
    with pytest.raises(ConfigError) as caught:
        parse_protocol(text, "p.toml")
    assert key in str(caught.value) and "p.toml:8" in str(caught.value)
