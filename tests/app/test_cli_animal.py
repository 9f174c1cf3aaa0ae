"""`rigside animal add|edit|retire|list|history`: the contract's options, one-line refusals with exit 2,
the JSON listing read back by the json module, and the simulator's animals.sh run line by line."""

from __future__ import annotations

import json
import shlex

from mock_rig.history import cohort, write_history
from fixtures.devices import run_main as run_cli


def test_add_edit_list_retire_history(tmp_path, capsys):
    db = tmp_path / "store.sqlite3"
    code, out, err = run_cli(capsys, "animal", "add", "heron", "--species", "Rattus norvegicus", "--sex", "F",
                             "--date-of-birth", "2025-10-01", "--strain", "Long-Evans", "--genotype", "wild type",
                             "--baseline-weight-g", "335", "--cohort", "orchard", "--lab-id", "R-7",
                             "--operator", "Rivera, Ana", "--db", db)
    assert code == 0, err
    assert run_cli(capsys, "animal", "edit", "heron", "--genotype", "Th-Cre", "--operator", "Kim, Bo", "--db", db)[0] == 0
    listing = json.loads(run_cli(capsys, "animal", "list", "--json", "--db", db)[1])["animals"]
    assert [(a["name"], a["genotype"], a["lab_id"], a["baseline_weight_g"], a["missing"]) for a in listing] == [
        ("heron", "Th-Cre", "R-7", 335.0, [])]
    code, out, _ = run_cli(capsys, "animal", "history", "heron", "--db", db)
    assert code == 0 and "Kim, Bo  genotype: wild type -> Th-Cre" in out
    assert run_cli(capsys, "animal", "retire", "heron", "--reason", "study ended", "--db", db)[0] == 0
    code, out, _ = run_cli(capsys, "animal", "list", "--db", db)
    assert code == 0 and out.splitlines()[1].split()[0] == "heron" and out.rstrip().endswith("retired")


def test_bad_input_is_one_line_naming_the_option(tmp_path, capsys):
    db = tmp_path / "store.sqlite3"
    assert run_cli(capsys, "animal", "add", "heron", "--db", db)[0] == 0
    for args, option in ((["add", "heron"], "name"), (["add", "ibis", "--species", "rat"], "--species"),
                         (["add", "ibis", "--sex", "X"], "--sex"), (["edit", "nobody", "--sex", "F"], "name"),
                         (["add", "ibis", "--date-of-birth", "2025-13-01"], "--date-of-birth"),
                         (["add", "ibis", "--baseline-weight-g", "heavy"], "--baseline-weight-g"),
                         (["edit", "heron"], "edit"), (["retire", "heron"], "--reason"), (["add"], "name")):
        code, _, err = run_cli(capsys, "animal", *args, "--db", db)
        assert code == 2 and len(err.strip().splitlines()) == 1 and option in err, (args, err)


def test_the_simulated_cohort_script_fills_every_record(tmp_path, capsys):
    write_history(tmp_path / "h", cohort(3, seed=2), days=1)
    db = tmp_path / "store.sqlite3"
    for line in (tmp_path / "h" / "animals.sh").read_text().splitlines():
        if line.startswith("rigside "):
            words = [str(db) if w == "$DB" else w for w in shlex.split(line)[1:]]
            assert run_cli(capsys, *words)[0] == 0, line
    listing = json.loads(run_cli(capsys, "animal", "list", "--json", "--db", db)[1])["animals"]
    assert len(listing) == 3 and all(a["missing"] == [] for a in listing)
    assert {a["sex"] for a in listing} == {"F", "M"}
