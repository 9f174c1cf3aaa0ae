"""`rigside assign`: random assignment recorded in the decision log, reproducible from its seed; blinding keys."""

from __future__ import annotations

import hashlib
import json
import os
from datetime import datetime

import pytest

from drivers.wire import encode_event, encode_header
from monitor.app import cli
from monitor.app.services.blinding import key_file
from monitor.store.db import open_store
from monitor.store.decisions import entries
from monitor.store.plans import find_plan
from fixtures.devices import run_main as rigside

PROTOCOL = """
[protocol]
name = "{name}"
version = 1
task = "two_press"
target_ms = 650
tolerance = 0.2
reward_ul = 30
{eligibility}
"""

RULE = """
[eligibility]
cohort = "shore"
{extra}

[eligibility.groups.drug]
plateau = false
min_hit_rate = 0.0

[eligibility.groups.vehicle]
plateau = false
min_hit_rate = 0.0
"""

ANIMALS = ("heron", "wren", "tern", "kite")


def make_db(tmp_path, extra: str = "", name: str = "two-press", animals=ANIMALS, rule: bool = True):
    start = datetime.now().astimezone().replace(microsecond=0).isoformat()
    protocol = tmp_path / f"{name}.toml"
    protocol.write_text(PROTOCOL.format(name=name, eligibility=RULE.format(extra=extra) if rule else ""))
    db = tmp_path / "store.sqlite3"
    files = []
    for n, animal in enumerate(animals):
        data = encode_header(clock="ms", start=start)
        for k in range(5 + n):       # files differ: the same bytes are imported once
            t = 1000 + 4000 * k
            data += encode_event(t, "lever_down") + encode_event(t + 650, "lever_down") + encode_event(t + 700, "reward")
        files.append(tmp_path / f"{animal}_s01.rsw")
        files[-1].write_bytes(data)
    assert cli.main(["import", *map(str, files), "--protocol", str(protocol), "--db", str(db), "--no-fit"]) == 0
    return db


def assigned(db) -> list:
    conn = open_store(db, readonly=True)
    try:
        return [e.decision for e in entries(conn) if e.decision.decision == "assigned"]
    finally:
        conn.close()


def sha(text: str) -> str:
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def redo_blocks(seed: int, groups: list[str], k: int, per_block: int = 1) -> str:
    """Entry k of blocks-sha256-v1, redone from its definition in docs/eligibility.md with plain hashlib."""
    size = len(groups) * per_block
    block = k // size
    order = sorted(((g, i) for g in groups for i in range(per_block)),
                   key=lambda e: sha(f"{seed}:block:{block}:{e[0]}:{e[1]}"))
    return order[k % size][0]


def test_hashlib_is_the_sha256_of_the_standard():
    # FIPS 180-2, appendix B.1: SHA-256("abc")
    assert sha("abc") == "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"


def test_one_at_a_time_draws_are_recorded_and_redone_from_the_seed(tmp_path, capsys):
    db = make_db(tmp_path)
    for animal in ANIMALS:
        code, out, err = rigside(capsys, "assign", "--db", str(db), "--animal", animal, "--operator", "ana",
                                 "--reason", "reached the plateau")
        assert code == 0, err
        assert f"{animal} assigned to" in out and "blocks-sha256-v1" in out and "veterinarian" in out
    conn = open_store(db, readonly=True)
    plan = find_plan(conn, "shore")
    conn.close()
    assert (plan.method, plan.groups, plan.per_block, plan.blinded) == ("blocks-sha256-v1", ("drug", "vehicle"), 1,
                                                                         False)
    decisions = assigned(db)
    assert [d.animal for d in decisions] == list(ANIMALS)
    assert {(d.assignment_method, d.assignment_seed) for d in decisions} == {("blocks-sha256-v1", plan.seed)}
    # reproducible: the k-th animal's group follows from the recorded seed and method alone
    # (outside reference: Python's hashlib SHA-256, checked against FIPS 180-2 above)
    for k, d in enumerate(decisions):
        assert d.group == redo_blocks(d.assignment_seed, ["drug", "vehicle"], k)
    assert sorted(d.group for d in decisions) == ["drug", "drug", "vehicle", "vehicle"]   # two full blocks
    assert rigside(capsys, "log", "verify", "--db", str(db))[0] == 0


def test_a_listed_cohort_is_dealt_at_once_and_redone_from_the_seed(tmp_path, capsys):
    db = make_db(tmp_path, extra='assignment = "cohort"')
    code, out, err = rigside(capsys, "assign", "--db", str(db), "--animals", *ANIMALS, "--operator", "ana",
                             "--reason", "cohort complete")
    assert code == 0, err
    decisions = assigned(db)
    seed = decisions[0].assignment_seed
    assert {d.assignment_method for d in decisions} == {"cohort-sha256-v1"}
    # cohort-sha256-v1 redone with plain hashlib: animals by rank, groups by rank of "group:NAME", round-robin
    animals = sorted(ANIMALS, key=lambda a: sha(f"{seed}:{a}"))
    slots = sorted(["drug", "vehicle"], key=lambda g: sha(f"{seed}:group:{g}"))
    assert {d.animal: d.group for d in decisions} == {a: slots[i % 2] for i, a in enumerate(animals)}
    code, _, err = rigside(capsys, "assign", "--db", str(db), "--animals", "heron", "--operator", "ana",
                           "--reason", "again")
    assert code == 2 and "already assigned" in err


@pytest.mark.parametrize("args, words", [
    (["--animal", "nobody"], "--animal: no animal 'nobody'"),
    (["--animal", "heron", "--reason", ""], "--reason: needed"),
    (["--animals", "heron", "heron"], "listed twice"),
    (["--animals", "heron", "wren"], "one animal at a time"),
])
def test_bad_assignments_are_one_line_and_exit_2(tmp_path, capsys, args, words):
    db = make_db(tmp_path, animals=("heron", "wren"))
    base = {"--operator": "ana", "--reason": "why"}
    for option in ("--operator", "--reason"):
        if option not in args:
            args = args + [option, base[option]]
    code, out, err = rigside(capsys, "assign", "--db", str(db), *args)
    assert code == 2 and words in err and err.count("\n") == 1 and assigned(db) == []


def test_an_animal_already_assigned_is_refused(tmp_path, capsys):
    db = make_db(tmp_path, animals=("heron",))
    args = ("assign", "--db", str(db), "--animal", "heron", "--operator", "ana", "--reason", "why")
    assert rigside(capsys, *args)[0] == 0
    code, _, err = rigside(capsys, *args)
    assert code == 2 and "heron is already assigned (entry 1" in err and len(assigned(db)) == 1


def test_a_cohort_without_groups_is_refused(tmp_path, capsys):
    db = make_db(tmp_path, animals=("heron",), rule=False)
    code, _, err = rigside(capsys, "assign", "--db", str(db), "--animal", "heron", "--operator", "ana",
                           "--reason", "why")
    assert code == 2 and "no [eligibility] groups" in err


def test_a_blinded_cohort_records_codes_and_keeps_the_key_beside_the_database(tmp_path, capsys):
    db = make_db(tmp_path, extra="blinded = true")
    for animal in ANIMALS:
        code, out, err = rigside(capsys, "assign", "--db", str(db), "--animal", animal, "--operator", "ana",
                                 "--reason", "plateau")
        assert code == 0, err
        assert "drug" not in out and "vehicle" not in out and "(blinded)" in out
    decisions = assigned(db)
    assert all(d.group is None and d.group_code.startswith("G-") for d in decisions)
    # the draw is among the codes, so the recorded seed re-derives codes, not groups (plain hashlib)
    codes = sorted({d.group_code for d in decisions})
    for k, d in enumerate(decisions):
        assert d.group_code == redo_blocks(d.assignment_seed, codes, k)
    # the key is a file beside the database (owner-only), never in it nor in the log export
    path = key_file(db, "shore")
    assert path.parent == db.parent / "store.sqlite3.blinding" and oct(os.stat(path).st_mode & 0o777) == "0o600"
    secret = json.loads(path.read_text())["secret"]
    assert secret.encode() not in db.read_bytes()
    assert rigside(capsys, "log", "export", "--db", str(db), "--csv", str(tmp_path / "log.csv"))[0] == 0
    exported = (tmp_path / "log.csv").read_text()
    assert "drug" not in exported and "vehicle" not in exported and secret not in exported
    # whoever holds the blind can reveal it, with a warning
    code, out, err = rigside(capsys, "assign", "--db", str(db), "--reveal-key", "--cohort", "shore")
    assert code == 0 and "WARNING: this unblinds cohort 'shore'" in err
    table = dict(line.split("\t") for line in out.splitlines() if "\t" in line)
    assert set(table.values()) == {"drug", "vehicle"} and set(table) == set(codes)
    # decide speaks codes too: a group name is refused, a code is recorded
    code, _, err = rigside(capsys, "decide", "--db", str(db), "--animal", "heron", "--decision", "eligible",
                           "--group", "drug", "--operator", "ana", "--reason", "why")
    assert code == 2 and "blinded" in err and "drug" not in err.replace("--group", "")
    assert rigside(capsys, "assign", "--db", str(db), "--reveal-key", "--cohort", "other")[0] == 2
