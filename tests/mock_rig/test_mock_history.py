"""`python -m mock_rig history`: files as docs/mock_rig.md says, protocol files per docs/protocol.md, and a
truth file that agrees with what the bytes say."""

import json
import tomllib
from datetime import datetime

import pytest

from drivers.wire import Event, Header, Malformed, decode_all
from mock_rig.__main__ import main


@pytest.fixture(scope="module")
def history(tmp_path_factory):
    out = tmp_path_factory.mktemp("hist")
    assert main(["history", "--animals", "3", "--days", "10", "--seed", "3", "--out", str(out)]) == 0
    return out


@pytest.mark.slow
def test_history_files_and_names(history):
    truth = json.loads((history / "truth.json").read_text())
    names = sorted(truth["animals"])
    assert len(names) == 3
    for name in names:
        sessions = truth["animals"][name]["sessions"]
        assert len(sessions) == 8  # 10 calendar days from a Monday: 8 weekdays
        files = sorted(p.name for p in history.glob(f"{name}_s*.rsw"))
        assert files == [f"{name}_s{i:02d}.rsw" for i in range(1, 9)]
        assert (history / f"{name}.protocol.toml").exists()


@pytest.mark.slow
def test_session_files_header_and_truth_counts(history):
    truth = json.loads((history / "truth.json").read_text())
    for name, animal in truth["animals"].items():
        starts = []
        for record in animal["sessions"]:
            records = decode_all((history / record["file"]).read_bytes())
            assert not [r for r in records if isinstance(r, Malformed)]
            header = records[0]
            assert isinstance(header, Header) and header.fields["fw"]
            start = datetime.fromisoformat(header.fields["start"])
            assert start.utcoffset() is not None
            starts.append(start)
            outcomes = [r.args[0] for r in records if isinstance(r, Event) and r.name == "outcome"]
            rewards = sum(isinstance(r, Event) and r.name == "reward" for r in records)
            assert record["trials"] == outcomes.count("hit") + outcomes.count("miss")
            assert record["hits"] == outcomes.count("hit") == rewards
            total = record["fast"] + record["slow"]
            assert 0.0 <= record["consolidation"] <= 1.0
            assert record["consolidation"] == pytest.approx(record["slow"] / total)
            assert record["fast"] == pytest.approx(abs(record["x_fast"]))
        assert all(s.weekday() < 5 for s in starts)  # weekday sessions only
        assert starts == sorted(starts)
        weekend_gap = (starts[5] - starts[4]).total_seconds() / 3600  # Friday -> Monday
        assert weekend_gap > 60


def test_learning_accumulates_across_sessions(history):
    truth = json.loads((history / "truth.json").read_text())
    for animal in truth["animals"].values():
        slow = [s["slow"] for s in animal["sessions"]]
        assert slow[-1] > slow[0]


def test_protocol_file_follows_contract_section_3(history):
    doc = tomllib.loads((history / "alder.protocol.toml").read_text())
    assert set(doc["protocol"]) == {"name", "version", "task", "target_ms", "tolerance",
                                    "trial_timeout_ms", "reward_ul"}
    assert doc["protocol"]["task"] == "two_press" and doc["protocol"]["target_ms"] == 650
    assert doc["plateau"] == {"rule": "consecutive_sessions", "min_hit_rate": 0.5, "sessions": 3}
    assert [s["name"] for s in doc["stages"]] == ["wide", "adaptive", "final"]
    assert doc["stages"][1]["adaptive"]["target_rate"] == 0.5
    assert doc["stages"][-1]["target_ms"] == doc["protocol"]["target_ms"]


def test_same_seed_same_bytes_other_seed_differs(tmp_path):
    runs = []
    for seed, where in ((5, "a"), (5, "b"), (6, "c")):
        out = tmp_path / where
        main(["history", "--animals", "1", "--days", "1", "--seed", str(seed), "--out", str(out)])
        runs.append((out / "alder_s01.rsw").read_bytes())
    assert runs[0] == runs[1] != runs[2]


def test_legacy_history_still_counts_hits_from_rewards(tmp_path):
    main(["history", "--animals", "1", "--days", "1", "--out", str(tmp_path), "--legacy"])
    truth = json.loads((tmp_path / "truth.json").read_text())
    record = truth["animals"]["alder"]["sessions"][0]
    records = decode_all((tmp_path / record["file"]).read_bytes())
    names = {r.name for r in records if isinstance(r, Event)}
    assert "outcome" not in names
    assert record["hits"] == sum(isinstance(r, Event) and r.name == "reward" for r in records)


def test_bad_arguments_exit_2(tmp_path, capsys):
    with pytest.raises(SystemExit) as stop:
        main(["history", "--animals", "0", "--out", str(tmp_path)])
    assert stop.value.code == 2
    assert "--animals" in capsys.readouterr().err


def test_trial_truth_matches_the_bytes_and_the_session_truth(tmp_path):
    main(["history", "--animals", "1", "--days", "2", "--out", str(tmp_path), "--trial-truth"])
    truth = json.loads((tmp_path / "truth.json").read_text())
    sessions = truth["animals"]["alder"]["sessions"]
    rows = [line.split(",") for line in (tmp_path / "alder.trials.csv").read_text().splitlines()]
    header, rows = rows[0], rows[1:]
    col = {name: i for i, name in enumerate(header)}
    for record in sessions:
        mine = [r for r in rows if int(r[col["session"]]) == record["index"]]
        assert len(mine) == record["trials"]
        assert sum(int(r[col["hit"]]) for r in mine) == record["hits"]
        last = mine[-1]
        assert float(last[col["x_fast"]]) == pytest.approx(record["x_fast"], abs=1e-6)
        assert float(last[col["x_slow"]]) == pytest.approx(record["x_slow"], abs=1e-6)
        # the interval of each completed trial is the onset-to-onset time in the file
        records = decode_all((tmp_path / record["file"]).read_bytes())
        downs, intervals = [], []
        for r in records:
            if isinstance(r, Event) and r.name == "trial_start":
                downs = []
            elif isinstance(r, Event) and r.name == "lever_down":
                downs.append(r.t_us)
            elif isinstance(r, Event) and r.name == "outcome" and r.args[0] in ("hit", "miss"):
                intervals.append((downs[-1] - downs[-2]) / 1000)
        produced = [float(r[col["interval_ms"]]) for r in mine]
        assert intervals == pytest.approx(produced, abs=0.002)
