"""`rigside export events|trials --csv` across a daylight-saving change: pandas reads both files without options,
with the documented dtypes; the events CSV's wall clock agrees with pandas' own ISO 8601 parsing, and both files
count time from the same origin."""

from __future__ import annotations

import pytest

from mock_rig.history import cohort, write_history
from monitor.app.cli import main
from monitor.store.csv_export import EVENT_COLUMNS, TRIAL_CSV_COLUMNS

pd = pytest.importorskip("pandas")

# Europe/Berlin leaves +01:00 for +02:00 on 2026-03-29 (from memory: the last Sunday of March, EU rule)
BEFORE, AFTER = "2026-03-28T09:00:00+01:00", "2026-03-30T09:00:00+02:00"


def session(start: str) -> bytes:
    """Three framed trials: a hit at 650 ms, a lone press, an omission; a note that looks like a formula."""
    lines = [f"# rigside-wire 1 clock=us wrap=32 fw=box-v3 start={start}", "500000 session_start",
             "1000000 trial_start", "1200000 lever_down", "1300000 lever_up", "1850000 lever_down",
             "1900000 lever_up", "1850500 outcome hit", "5000000 trial_start", "5100000 lever_down",
             "5200000 lever_up", "7100000 outcome lone", "9000000 trial_start", "12000000 outcome omission",
             "12500000 note =1+1", "13000000 session_end"]
    return ("\n".join(lines) + "\n").encode("ascii")


def run_cli(capsys, *args) -> tuple[int, str, str]:
    code = main([str(a) for a in args])
    captured = capsys.readouterr()
    return code, captured.out, captured.err


def test_csvs_across_a_daylight_saving_change(tmp_path, capsys):
    write_history(tmp_path / "h", cohort(1, seed=1), days=1)
    files = []
    for k, start in enumerate((BEFORE, AFTER), start=1):
        files.append(tmp_path / f"oak_s{k:02d}.rsw")
        files[-1].write_bytes(session(start))
    db = tmp_path / "store.sqlite3"
    code, _, err = run_cli(capsys, "import", *files, "--protocol", tmp_path / "h" / "alder.protocol.toml", "--db", db,
                           "--no-fit")
    assert code == 0, err
    assert run_cli(capsys, "export", "events", "--db", db, "--csv", tmp_path / "events.csv")[0] == 0
    assert run_cli(capsys, "export", "trials", "--db", db, "--csv", tmp_path / "trials.csv")[0] == 0
    assert not list(tmp_path.glob("*.part"))

    events = pd.read_csv(tmp_path / "events.csv")  # no options: what an analyst types first
    trials = pd.read_csv(tmp_path / "trials.csv")
    assert tuple(events.columns) == EVENT_COLUMNS and tuple(trials.columns) == TRIAL_CSV_COLUMNS
    for column in ("session", "segment", "line", "device_time", "t_us"):
        assert pd.api.types.is_integer_dtype(events[column]), column
    assert events["session_time_s"].dtype == "float64"
    for column in ("animal", "wall_time", "event"):
        assert pd.api.types.is_string_dtype(events[column]), column
    for column in ("session", "trial", "t_us", "excluded", "segment"):
        assert pd.api.types.is_integer_dtype(trials[column]), column
    for column in ("session_time_s", "interval_ms", "target_ms", "window_low_ms", "window_high_ms"):
        assert trials[column].dtype == "float64", column
    assert pd.api.types.is_string_dtype(trials["session_start"])

    # the wall clock carries each session's own offset, and pandas' ISO 8601 parser agrees with session_time_s
    offsets = events.groupby("session")["wall_time"].agg(lambda w: {t[-6:] for t in w})
    assert offsets.to_dict() == {1: {"+01:00"}, 2: {"+02:00"}}
    wall = pd.to_datetime(events["wall_time"], format="ISO8601", utc=True)
    start = pd.to_datetime(events["session"].map({1: BEFORE, 2: AFTER}), format="ISO8601", utc=True)
    assert ((wall - start).dt.total_seconds() - events["session_time_s"]).abs().max() < 1e-6
    assert (events.loc[events["event"] == "trial_start", "session_time_s"].round(6).tolist()
            == [1.0, 5.0, 9.0] * 2)  # device counter 1 000 000 µs after a header taken at counter 0
    assert events.loc[events["event"] == "note", "value"].tolist() == ["'=1+1"] * 2

    # one origin: each trial's first press (trials CSV) is a lever_down time in the events CSV of its session
    for number in (1, 2):
        presses = set(events[(events["session"] == number) & (events["event"] == "lever_down")]["session_time_s"])
        pressed = trials[(trials["session"] == number) & trials["outcome"].isin(["hit", "lone"])]
        assert set(pressed["session_time_s"]) <= presses and len(pressed) == 2
    assert trials.groupby("session")["outcome"].agg(list).to_dict() == {1: ["hit", "lone", "omission"],
                                                                      2: ["hit", "lone", "omission"]}


def test_a_csv_export_that_fails_midway_leaves_the_earlier_file_whole(tmp_path, capsys, monkeypatch):
    from monitor.store import csv_export
    from monitor.store.db import open_store

    write_history(tmp_path / "h", cohort(1, seed=1), days=1)
    db = tmp_path / "store.sqlite3"
    assert run_cli(capsys, "import", *sorted((tmp_path / "h").glob("alder_s*.rsw")), "--protocol",
                   tmp_path / "h" / "alder.protocol.toml", "--db", db, "--no-fit")[0] == 0
    target = tmp_path / "events.csv"
    target.write_text("the earlier export\n")
    calls = []

    def failing(value):
        calls.append(value)
        if len(calls) > 50:  # some blocks of rows are written by then
            raise OSError(28, "No space left on device")
        return value

    monkeypatch.setattr(csv_export, "safe_cell", failing)
    conn = open_store(db, readonly=True)
    try:
        with pytest.raises(OSError):
            csv_export.write_events_csv(conn, target, block_rows=100)
    finally:
        conn.close()
    assert target.read_text() == "the earlier export\n" and sorted(p.name for p in tmp_path.glob("*.part")) == []


def _export_events(db: str, target: str) -> int:
    return main(["export", "events", "--db", db, "--csv", target, "--quiet"])


def test_two_exports_to_one_file_at_once_both_succeed_and_leave_it_whole(tmp_path, capsys):
    from fixtures.races import together

    write_history(tmp_path / "h", cohort(1, seed=2), days=4)
    db = tmp_path / "store.sqlite3"
    files = sorted((tmp_path / "h").glob("*.rsw"))
    assert run_cli(capsys, "import", *files, "--protocol", tmp_path / "h" / "alder.protocol.toml", "--db", db,
                   "--no-fit")[0] == 0
    alone = tmp_path / "alone.csv"
    assert _export_events(str(db), str(alone)) == 0
    target = tmp_path / "shared.csv"
    for _ in range(3):
        assert together(_export_events, (str(db), str(target)), 2) == [0, 0]
        assert target.read_bytes() == alone.read_bytes()   # one whole export, not a mix of two
        assert not list(tmp_path.glob("*.part")) and not list(tmp_path.glob(".*.part"))
