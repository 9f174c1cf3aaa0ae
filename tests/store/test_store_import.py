"""monitor.store.importer and derive: mock_rig history, a mapped foreign format, malformed lines, sessions, re-import."""

from __future__ import annotations

from datetime import datetime, timedelta
from pathlib import Path

import pytest

from drivers.mapping import parse_mapping
from drivers.wire import Event, decode_all, encode_event, encode_header
from monitor.core.protocol import parse_protocol
from monitor.core.session.animal_report import SessionData, animal_report
from monitor.store.db import open_store
from monitor.store.derive import rebuild_trials, session_events, stored_trials
from monitor.store.importer import ImportRefused, import_file
from monitor.store.reporting import report
from fixtures.protocols import protocol_toml

pytestmark = pytest.mark.slow  # windows, subprocesses or simulated histories: seconds per test

PROTOCOL = protocol_toml(version=2, plateau_sessions=3)


def do_import(conn, path: Path, protocol_text: str, **kwargs):
    protocol = parse_protocol(protocol_text)
    conn.execute("BEGIN IMMEDIATE")
    try:
        result = import_file(conn, path, path.read_bytes(), protocol_text=protocol_text, protocol_name=protocol.name,
                             protocol_version=protocol.version, **kwargs)
        conn.execute("COMMIT")
    except BaseException:
        conn.execute("ROLLBACK")
        raise
    return result


def import_history(conn, out: Path, truth: dict) -> None:
    for animal in truth["animals"]:
        text = (out / f"{animal}.protocol.toml").read_text()
        for path in sorted(out.glob(f"{animal}_s*.rsw")):
            do_import(conn, path, text)


def test_history_import_matches_the_simulators_truth(tmp_path, mock_history):
    out, truth = mock_history
    conn = open_store(tmp_path / "store.sqlite3")
    import_history(conn, out, truth)
    document = report(conn)
    assert [a["animal"] for a in document["animals"]] == sorted(truth["animals"])
    for entry in document["animals"]:
        expected = truth["animals"][entry["animal"]]["sessions"]
        # truth.json is written by mock_rig from the box's own decisions (independent of the store and the core)
        assert [(s["start"], s["trials"], s["hits"]) for s in entry["sessions"]] == \
            [(s["start"], s["trials"], s["hits"]) for s in expected]
        assert [s["premature"] for s in entry["sessions"]] == [s["premature"] for s in expected]
        assert [s["water_ul"] for s in entry["sessions"]] == [float(s["water_ul"]) for s in expected]
        assert entry["consolidation"] == {"session": len(expected), "estimate": 0.0, "low": 0.0, "high": 1.0,
                                          "status": "not fitted", "current": False}
    events = conn.execute("SELECT count(*) FROM events").fetchone()[0]
    lines = sum(len([r for r in decode_all(p.read_bytes()) if type(r).__name__ == "Event"]) for p in out.glob("*.rsw"))
    assert events == lines


def test_report_from_stored_trials_equals_the_report_from_events(tmp_path, mock_history):
    out, truth = mock_history
    conn = open_store(tmp_path / "store.sqlite3")
    import_history(conn, out, truth)
    animal = sorted(truth["animals"])[0]
    protocol = parse_protocol((out / f"{animal}.protocol.toml").read_text())
    ids = [r[0] for r in conn.execute("SELECT id FROM sessions WHERE animal = ? ORDER BY started_at", (animal,))]
    starts = [r[0] for r in conn.execute("SELECT start_wall FROM sessions WHERE animal = ? ORDER BY started_at",
                                         (animal,))]
    from_events = animal_report(animal, protocol, [SessionData(events=list(session_events(conn, i)), start=s)
                                                   for i, s in zip(ids, starts)])
    stored = report(conn, animal)["animals"][0]
    for a, b in zip(from_events["sessions"], stored["sessions"]):
        assert {k: a[k] for k in a} == {k: b[k] for k in a}
    assert from_events["plateau"] == stored["plateau"]


def test_trials_rebuild_gives_the_same_rows(tmp_path, mock_history):
    out, truth = mock_history
    conn = open_store(tmp_path / "store.sqlite3")
    import_history(conn, out, truth)
    before = stored_trials(conn, 1)
    conn.execute("DELETE FROM trials WHERE session_id = 1")
    conn.execute("UPDATE sessions SET first_event = NULL, last_event = NULL WHERE id = 1")  # full-scan path
    rebuild_trials(conn, 1)
    after = stored_trials(conn, 1)
    assert len(before) > 100
    assert [t._replace(interval_ms=round(t.interval_ms, 9)) for t in before if t.interval_ms == t.interval_ms] == \
        [t._replace(interval_ms=round(t.interval_ms, 9)) for t in after if t.interval_ms == t.interval_ms]
    assert len(before) == len(after)


def test_reimport_of_the_same_bytes_is_refused_and_changes_nothing(tmp_path, mock_history):
    out, _ = mock_history
    conn = open_store(tmp_path / "store.sqlite3")
    path = sorted(out.glob("*_s01.rsw"))[0]
    do_import(conn, path, PROTOCOL, animal="heron")
    copy = tmp_path / "renamed.rsw"
    copy.write_bytes(path.read_bytes())
    counts = [conn.execute(f"SELECT count(*) FROM {t}").fetchone()[0] for t in ("events", "sessions", "trials")]
    with pytest.raises(ImportRefused, match="already imported"):
        do_import(conn, copy, PROTOCOL, animal="heron")
    assert counts == [conn.execute(f"SELECT count(*) FROM {t}").fetchone()[0] for t in ("events", "sessions", "trials")]


def test_malformed_lines_are_kept_counted_and_reported(tmp_path):
    start = "2026-03-02T09:14:03+01:00"
    data = (encode_header(clock="us", wrap=32, start=start) + encode_event(1000, "session_start")
            + b"garbage line\n" + encode_event(2000, "lever_down") + b"3000 reward lots\n"
            + encode_event(2600_000, "lever_down") + b"\xff\xfe not ascii\n" + encode_event(9000_000, "session_end")
            + b"12 unterminated")
    path = tmp_path / "heron_s01.rsw"
    path.write_bytes(data)
    conn = open_store(tmp_path / "store.sqlite3")
    result = do_import(conn, path, PROTOCOL)
    assert (result.sessions, result.events, result.malformed) == (1, 4, 4)
    rows = conn.execute("SELECT line, reason, raw FROM raw_lines WHERE kind = 'malformed' ORDER BY line").fetchall()
    assert [r[0] for r in rows] == [3, 5, 7, 9]
    assert rows[0][2] == b"garbage line" and rows[2][2] == b"\xff\xfe not ascii" and rows[3][2] == b"12 unterminated"
    entry = report(conn, "heron")["animals"][0]
    assert entry["sessions"][0]["malformed_lines"] == 4
    assert entry["sessions"][0]["start"] == start
    assert conn.execute("SELECT animal FROM sessions").fetchone()[0] == "heron"  # from NAME_sNN


def test_sessions_split_at_session_end_and_at_a_long_pause(tmp_path):
    data = encode_header(clock="ms", start="2026-03-02T09:00:00+01:00")
    for base, interval in ((0, 900), (600_000, 700)):  # two sessions framed by session_start/_end (ms clock)
        data += encode_event(base + 1, "session_start") + encode_event(base + 2, "lever_down")
        data += encode_event(base + 2 + interval, "lever_down") + encode_event(base + 1000, "session_end")
    pause = 600_000 + 3 * 3600 * 1000  # three hours later, no framing: the gap rule
    data += encode_event(pause, "lever_down") + encode_event(pause + 650, "lever_down")
    path = tmp_path / "day.rsw"
    path.write_bytes(data)
    conn = open_store(tmp_path / "store.sqlite3")
    result = do_import(conn, path, PROTOCOL, animal="wren")
    assert result.sessions == 3
    starts = [r[0] for r in conn.execute("SELECT start_wall FROM sessions ORDER BY id")]
    assert starts == ["2026-03-02T09:00:00+01:00", "2026-03-02T09:10:00+01:00", "2026-03-02T12:10:00+01:00"]
    entry = report(conn, "wren")["animals"][0]
    assert [s["trials"] for s in entry["sessions"]] == [1, 1, 1]
    assert [s["hits"] for s in entry["sessions"]] == [0, 1, 1]  # 900 ms is outside 650 ± 130; 700 and 650 are inside


MAPPING = """
[format]
delimiter = ";"
header = true
timezone = "Europe/Berlin"

[columns]
wall_time = "host_time"
device_time = "ctr_ms"
animal = "subject"
event = "code"
value = "arg"

[clock]
unit = "ms"
wrap_bits = 16

[events]
LP = "lever_down"
LR = "lever_up"
RW = "reward"
"""


def foreign_file(path: Path, days: int = 2) -> dict[str, list[float]]:
    """Two animals interleaved per line, a 16-bit ms counter that wraps every 65.5 s; local times without offset."""
    intervals = {"kestrel": [600, 700, 400, 900, 650, 780], "plover": [500, 660, 640, 1200, 520, 790]}
    lines = ["host_time;ctr_ms;subject;code;arg"]
    expected: dict[str, list[float]] = {name: [] for name in intervals}
    for day in range(days):
        wall0 = datetime(2026, 3, 2 + day, 9, 0, 0)
        for trial in range(60):  # 60 trials 4 s apart: 240 s, more than three wraps
            for k, (name, values) in enumerate(intervals.items()):
                interval = values[trial % len(values)]
                t0 = 1000 + k * 37 + trial * 4000  # ms since the box's counter started
                for t, code, arg in ((t0, "LP", "1"), (t0 + 80, "LR", "1"), (t0 + interval, "LP", "1"),
                                     (t0 + interval + 90, "LR", "1"), (t0 + interval + 100, "RW", "30")):
                    wall = wall0 + timedelta(milliseconds=t)
                    lines.append(f"{wall.isoformat(timespec='milliseconds')};{t % 65536};{name};{code};{arg}")
                expected[name].append(float(interval))
        lines.append("not;a;valid;line")  # too few fields for the header? no: a non-numeric time
    path.write_text("\n".join(lines) + "\n")
    return expected


def test_mapped_foreign_history_with_a_wrapping_counter_and_two_animals(tmp_path):
    path = tmp_path / "lab_history.csv"
    expected = foreign_file(path)
    mapping = parse_mapping(MAPPING, "lab.toml")
    conn = open_store(tmp_path / "store.sqlite3")
    result = do_import(conn, path, PROTOCOL, mapping=mapping, mapping_text=MAPPING)
    assert result.sessions == 4  # two animals x two days (the overnight pause splits the days)
    assert result.malformed == 2
    assert result.events == 2 * 2 * 60 * 5
    rows = conn.execute("SELECT animal, start_wall FROM sessions ORDER BY animal, started_at").fetchall()
    # Europe/Berlin is UTC+01:00 on 2 March (zoneinfo, outside check of the offset)
    assert rows == [("kestrel", "2026-03-02T09:00:01+01:00"), ("kestrel", "2026-03-03T09:00:01+01:00"),
                    ("plover", "2026-03-02T09:00:01+01:00"), ("plover", "2026-03-03T09:00:01+01:00")]
    for animal, intervals in expected.items():
        ids = [r[0] for r in conn.execute("SELECT id FROM sessions WHERE animal = ? ORDER BY started_at", (animal,))]
        got = [t.interval_ms for i in ids for t in stored_trials(conn, i)]
        assert got == pytest.approx(intervals)  # across every wrap of the 16-bit counter
    entry = report(conn, "kestrel")["animals"][0]
    hits = sum(1 for v in expected["kestrel"][:60] if abs(v - 650) <= 130)
    assert entry["sessions"][0]["hits"] == hits and entry["sessions"][0]["trials"] == 60
    assert entry["sessions"][0]["water_ul"] == 60 * 30
    bad = conn.execute("SELECT raw FROM raw_lines WHERE kind = 'malformed'").fetchall()
    assert bad == [(b"not;a;valid;line",)] * 2


def test_mapped_file_with_a_session_column_names_its_sessions(tmp_path):
    mapping_text = MAPPING.replace('animal = "subject"', 'animal = "subject"\nsession = "run"')
    lines = ["host_time;ctr_ms;subject;run;code;arg"]
    for run, base in (("r1", 0), ("r2", 10_000)):
        for name in ("kestrel", "plover"):
            lines += [f"2026-03-02T09:00:{base // 1000:02d};{base + 100};{name};{run};LP;1",
                      f"2026-03-02T09:00:{base // 1000:02d};{base + 750};{name};{run};LP;1"]
    path = tmp_path / "runs.csv"
    path.write_text("\n".join(lines) + "\n")
    conn = open_store(tmp_path / "store.sqlite3")
    result = do_import(conn, path, PROTOCOL, mapping=parse_mapping(mapping_text, "lab.toml"))
    assert result.sessions == 4
    assert sorted(result.labels) == ["r1", "r1", "r2", "r2"]


def test_a_file_without_any_animal_is_refused(tmp_path):
    path = tmp_path / "box.rsw"
    path.write_bytes(encode_header() + encode_event(5, "lever_down"))
    conn = open_store(tmp_path / "store.sqlite3")
    with pytest.raises(ImportRefused, match="--animal"):
        do_import(conn, path, PROTOCOL)
    assert conn.execute("SELECT count(*) FROM imports").fetchone()[0] == 0


def test_no_wall_time_falls_back_to_the_file_time_with_a_notice(tmp_path):
    path = tmp_path / "heron_s02.rsw"
    path.write_bytes(encode_header() + encode_event(5, "lever_down") + encode_event(650_005, "lever_down"))
    conn = open_store(tmp_path / "store.sqlite3")
    result = do_import(conn, path, PROTOCOL)
    assert result.notices and "modification time" in result.notices[0]
    notice = conn.execute("SELECT reason FROM raw_lines WHERE kind = 'notice'").fetchone()[0]
    assert "modification time" in notice
    start = datetime.fromisoformat(conn.execute("SELECT start_wall FROM sessions").fetchone()[0])
    assert abs(start.timestamp() - path.stat().st_mtime) < 1.0


def test_a_live_recorded_session_is_reported_before_and_after_its_trials_are_derived(tmp_path):
    import time as _time

    from drivers.status import Batch
    from drivers.wire import WireDecoder
    from monitor.store import db
    from monitor.store.derive import rebuild_missing
    from monitor.store.writer import StoreWriter

    path = tmp_path / "store.sqlite3"
    writer = StoreWriter(path)
    writer.start()
    source = writer.call(lambda c: db.register_source(c, "serial", "/dev/box1", "box1"))
    session = writer.call(lambda c: db.start_session(c, source, "heron", "box1", "two-press 650 ms", 2, PROTOCOL))
    stream = encode_header() + b"".join(encode_event(1000 + 4_000_000 * k, "lever_down")
                                        + encode_event(1000 + 4_000_000 * k + 600_000 + 100_000 * k, "lever_down")
                                        for k in range(6))  # intervals 600 ... 1100 ms
    writer.submit(Batch(WireDecoder().feed(stream), _time.time()), source_id=source, session_id=session, live=True)
    assert writer.stop()
    conn = open_store(path)
    live = report(conn, "heron")["animals"][0]["sessions"][0]
    assert (live["trials"], live["hits"]) == (6, 2)  # only 600 and 700 lie inside 650 ± 130 (520-780)
    assert rebuild_missing(conn) == 1 and rebuild_missing(conn) == 0
    assert report(conn, "heron")["animals"][0]["sessions"][0] == live


def test_a_file_a_recorder_follows_now_is_not_imported_and_a_stale_lock_does_not_stop_it(tmp_path):
    """A recorder (`rigside record`, the window) holds its file's source lock from before it reads: an import of
    that file, even one checked before the recorder began, is refused when it stores (the recorder stores those
    events itself); the lock of a recorder that is gone does not stop the import."""
    from monitor.store.importer import RecordedMeanwhile
    from monitor.store.source_locks import STALE_S, acquire, resource_key

    conn = open_store(tmp_path / "store.sqlite3")
    log = tmp_path / "box1.rsw"
    log.write_bytes(encode_header(fw="t") + b"".join(encode_event(i, "lever_down") for i in range(20)))
    with conn:
        acquire(conn, resource_key("file", str(tmp_path / "." / "box1.rsw")), "rigside record")
    with pytest.raises(RecordedMeanwhile, match="is being recorded into this database by rigside record"):
        do_import(conn, log, PROTOCOL, animal="heron")
    assert conn.execute("SELECT count(*) FROM events").fetchone()[0] == 0
    with conn:  # the holder went silent long ago on another host: stale
        conn.execute("UPDATE source_locks SET host = 'elsewhere', heartbeat_at = heartbeat_at - ?", (STALE_S + 1,))
    assert do_import(conn, log, PROTOCOL, animal="heron").events == 20


def test_a_copy_whose_line_endings_changed_is_refused_as_stored_already(tmp_path, mock_history):
    """The same session file after a copy that turned LF into CRLF (a text-mode transfer, an editor): other
    bytes, so another digest, but the same animal, start and events: refused, whole or cut short, alone or
    beside a new session, and the sessions it names are the stored ones; once those are excluded it goes in."""
    from monitor.store.importer import StoredAlready
    from monitor.store.session_changes import set_excluded

    out, _ = mock_history
    conn = open_store(tmp_path / "store.sqlite3")
    original = sorted(out.glob("*_s01.rsw"))[0]
    do_import(conn, original, PROTOCOL, animal="heron")
    data = original.read_bytes()
    crlf = data.replace(b"\n", b"\r\n")
    cut = crlf[: crlf.index(b"\r\n", len(crlf) // 2) + 2]           # the copy made while the rig still wrote
    later = sorted(out.glob("*_s02.rsw"))[0].read_bytes().replace(b"\n", b"\r\n")
    counts = [conn.execute(f"SELECT count(*) FROM {t}").fetchone()[0] for t in ("events", "sessions", "imports")]
    for name, content, sessions in (("copy.rsw", crlf, "1 of its 1"), ("cut.rsw", cut, "1 of its 1"),
                                    ("both.rsw", crlf + later, "1 of its 2")):
        copy = tmp_path / name
        copy.write_bytes(content)
        with pytest.raises(StoredAlready, match=f"{sessions} sessions are stored already from other bytes: "
                                                f"{original.name}#1 \\({original}\\)"):
            do_import(conn, copy, PROTOCOL, animal="heron")
    assert counts == [conn.execute(f"SELECT count(*) FROM {t}").fetchone()[0] for t in ("events", "sessions", "imports")]
    with conn:
        set_excluded(conn, 1, True, operator="test", reason="the copy is kept instead")
    assert do_import(conn, tmp_path / "copy.rsw", PROTOCOL, animal="heron").events == len(
        [r for r in decode_all(data) if isinstance(r, Event)])
