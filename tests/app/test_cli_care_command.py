"""`rigside care` (not yet registered in cli.py): log weights, supplements and notes, print the care sheet."""

from __future__ import annotations

import csv
import errno
import os
import shutil
from datetime import datetime
from pathlib import Path

import pytest

from monitor.app import cli
from monitor.app.commands import care
from fixtures.disks import FullDisk
from fixtures.protocols import protocol_toml
from fixtures.stores import imported_store, rewarded_session

pytestmark = pytest.mark.slow  # windows, subprocesses or simulated histories: seconds per test

PROTOCOL = protocol_toml(reward_ul=30)


def rigside_care(capsys, *args) -> tuple[int, str, str]:
    parser = cli.OneLineParser(prog="rigside care")
    care.add_arguments(parser)
    try:
        code = care.run(parser.parse_args([str(a) for a in args]))
    except cli.UsageError as exc:
        print(f"rigside care: error: {exc}", file=__import__("sys").stderr)
        code = 2
    except SystemExit as exc:
        code = exc.code
    out = capsys.readouterr()
    return code, out.out, out.err


@pytest.fixture(scope="module")
def imported(tmp_path_factory) -> Path:
    """The store after one imported session today, made once per module."""
    today = datetime.now().astimezone()
    start = today.replace(hour=9, minute=0, second=0, microsecond=0)
    # 40 rewards x 30 µL = 1.2 mL (hand arithmetic), each confirmed by a lick
    folder = tmp_path_factory.mktemp("care")
    return imported_store(folder, {"heron_s01.rsw": rewarded_session(start, 40, licks=True)}, PROTOCOL)


@pytest.fixture
def db(imported, tmp_path, capsys) -> Path:
    """A fresh copy of the imported store (its files and the key beside it) for each test."""
    for path in imported.parent.iterdir():
        if path.is_file() and path.name.startswith(imported.name):
            shutil.copy2(path, tmp_path / path.name)
    capsys.readouterr()
    return tmp_path / imported.name


def test_care_log_and_sheet(tmp_path, capsys, db):
    now = datetime.now().astimezone().isoformat(timespec="seconds")
    assert rigside_care(capsys, "baseline", "--db", db, "--animal", "heron", "--grams", "25.0")[0] == 0
    assert rigside_care(capsys, "weigh", "--db", db, "--animal", "heron", "--grams", "21.3", "--by", "ana",
                        "--at", now)[0] == 0
    assert rigside_care(capsys, "supplement", "--db", db, "--animal", "heron", "--ml", "0.3", "--by", "bo",
                        "--at", now)[0] == 0
    assert rigside_care(capsys, "note", "--db", db, "--animal", "heron", "--by", "bo", "--text", "=eyes ok",
                        "--at", now)[0] == 0
    sheet = tmp_path / "sheet.csv"
    code, out, err = rigside_care(capsys, "sheet", "--db", db, "--csv", sheet)
    assert code == 0, err
    assert "heron" in out and "85.2 % of baseline" in out and "veterinarian" in out  # 21.3 / 25.0 = 85.2 %
    with open(sheet, newline="") as fh:
        row = next(csv.DictReader(fh))
    assert float(row["earned_ml"]) == pytest.approx(1.2) and float(row["total_ml"]) == pytest.approx(1.5)
    assert row["notes"] == "'=eyes ok"  # escaped for spreadsheets


@pytest.mark.parametrize("args, names", [
    (["weigh", "--animal", "nobody", "--grams", "20", "--by", "a"], "--animal"),
    (["weigh", "--animal", "heron", "--by", "a"], "--grams"),
    (["weigh", "--animal", "heron", "--grams", "-3", "--by", "a"], "--grams"),
    (["supplement", "--animal", "heron", "--ml", "0.5", "--by", "a", "--at", "yesterday"], "--at"),
    (["sheet", "--day", "2026-02-31"], "--day"),
])
def test_bad_care_input_is_one_line_and_exit_2(capsys, db, args, names):
    code, _, err = rigside_care(capsys, *args, "--db", db)
    assert code == 2 and len(err.strip().splitlines()) == 1 and names in err, err


def test_the_default_settings_file_sets_the_thresholds(tmp_path, capsys, db, monkeypatch):
    import platformdirs

    config = tmp_path / "config"
    config.mkdir()
    monkeypatch.setattr(platformdirs, "user_config_dir", lambda *a, **k: str(config))
    code, out, _ = rigside_care(capsys, "sheet", "--db", db)
    assert code == 0 and "of 1.00 ml minimum" in out                   # no file: the defaults
    (config / "settings.toml").write_text("[care]\ndaily_minimum_ml = 2.5\n")
    code, out, _ = rigside_care(capsys, "sheet", "--db", db)
    assert code == 0 and "of 2.50 ml minimum" in out
    (config / "settings.toml").write_text("[care]\n\nweight_limit_percent = 90\n")   # above the warning level
    code, _, err = rigside_care(capsys, "sheet", "--db", db)
    assert code == 2 and f"--settings: {config / 'settings.toml'}:3" in err and "weight_limit_percent" in err


def test_a_care_sheet_that_cannot_be_finished_leaves_the_last_one_whole(tmp_path, capsys, db, monkeypatch):
    assert rigside_care(capsys, "baseline", "--db", db, "--animal", "heron", "--grams", "25.0")[0] == 0
    sheet = tmp_path / "sheet.csv"
    assert rigside_care(capsys, "sheet", "--db", db, "--csv", sheet)[0] == 0
    before = sheet.read_bytes()
    monkeypatch.setattr(csv, "writer", FullDisk)
    code, _, err = rigside_care(capsys, "sheet", "--db", db, "--csv", sheet)
    assert code == 2 and "--csv" in err and os.strerror(errno.ENOSPC) in err
    assert sheet.read_bytes() == before and list(tmp_path.glob("*.part")) == []
