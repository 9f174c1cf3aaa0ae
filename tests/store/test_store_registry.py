"""Schema v2 and the audited records: migration from v1, animals, protocols, check-ins, conditions, exclusion,
insert-only decisions, the fits cache and the care log."""

from __future__ import annotations

import json
import sqlite3
from datetime import date, datetime, timedelta, timezone

import pytest

from drivers.wire import encode_event, encode_header
from monitor.core.care.ledger import CareConfig, day_summary
from monitor.core.protocol import parse_protocol
from monitor.store import db
from monitor.store.care_log import add_note, add_supplement, add_weighing, animal_care
from monitor.store.db import open_store
from monitor.store.fits import cached_block, data_fingerprint, save_fit
from monitor.store.importer import import_file
from monitor.store.registry import (RecordError, add_condition, check_in, check_out, conditions_of, ensure_animal,
                                   ensure_protocol, ensure_rig, exclude_session, find_animal)
from monitor.store.reporting import build_entry, refresh_cache, report
from monitor.store.schema import MIGRATIONS, SCHEMA_VERSION
from fixtures.protocols import protocol_toml

PROTOCOL = protocol_toml(reward_ul=30, plateau_sessions=2, min_trials=5)


def store(tmp_path):
    return open_store(tmp_path / "store.sqlite3")


def import_sessions(conn, tmp_path, animal: str, hit_counts: list[int], trials: int = 10) -> list[int]:
    """One session file per day: `hits` of `trials` presses pairs at 650 ms, the rest at 1000 ms."""
    for day, hits in enumerate(hit_counts):
        start = datetime(2026, 3, 2 + day, 9, 0, tzinfo=timezone(timedelta(hours=1))).isoformat()
        data = encode_header(clock="ms", start=start) + encode_event(1, "session_start")
        for k in range(trials):
            t = 1000 + 5000 * k
            data += encode_event(t, "lever_down") + encode_event(t + (650 if k < hits else 1000), "lever_down")
            if k < hits:
                data += encode_event(t + 700, "reward") + encode_event(t + 900, "lick")
        data += encode_event(1000 + 5000 * trials, "session_end")
        path = tmp_path / f"{animal}_s{day + 1:02d}.rsw"
        path.write_bytes(data)
        p = parse_protocol(PROTOCOL)
        conn.execute("BEGIN IMMEDIATE")
        import_file(conn, path, data, protocol_text=PROTOCOL, protocol_name=p.name, protocol_version=p.version)
        conn.execute("COMMIT")
    return [r[0] for r in conn.execute("SELECT id FROM sessions WHERE animal = ? ORDER BY started_at", (animal,))]


def test_version_1_file_migrates_to_the_newest_keeping_its_sessions(tmp_path):
    path = tmp_path / "old.sqlite3"
    conn = open_store(path, migrations=MIGRATIONS[:1])
    source = db.register_source(conn, "file", "/x.rsw", "box1")
    db.start_session(conn, source, "heron", "box1", "p", 1, "[protocol]")
    conn.close()
    conn = open_store(path)
    assert conn.execute("PRAGMA user_version").fetchone()[0] == SCHEMA_VERSION == len(MIGRATIONS)
    assert conn.execute("SELECT animal, rig, excluded, animal_id FROM sessions").fetchall() == [("heron", "box1", 0, None)]
    assert conn.execute("SELECT count(*) FROM sqlite_master WHERE name = 'events_by_session'").fetchone()[0] == 0
    assert conn.execute("SELECT count(*) FROM sqlite_master WHERE type = 'index' AND tbl_name = 'events'"
                        ).fetchone()[0] == 0  # the hot table stays without an index


def test_animals_rigs_and_protocols(tmp_path):
    conn = store(tmp_path)
    first = ensure_animal(conn, "heron", cohort="c1", sex="F", date_of_birth="2025-11-02", usual_boxes=["box1"],
                          baseline_weight_g=310.5, species="Rattus norvegicus")
    assert ensure_animal(conn, "heron", genotype="wt") == first
    heron = find_animal(conn, "heron")
    assert (heron.cohort, heron.sex, heron.genotype, heron.usual_boxes, heron.baseline_weight_g) == \
        ("c1", "F", "wt", ("box1",), 310.5)
    for bad, field in (({"sex": "female"}, "sex"), ({"date_of_birth": "02/11/2025"}, "date_of_birth"),
                       ({"baseline_weight_g": 0}, "baseline_weight_g"), ({"colour": "white"}, "colour")):
        with pytest.raises(RecordError, match=field):
            ensure_animal(conn, "heron", **bad)
    with pytest.raises(sqlite3.IntegrityError):
        conn.execute("INSERT INTO animals (name, created_at) VALUES ('heron', 0)")
    ensure_rig(conn, "box1", usb_serial="A1B2", valve_ul_per_ms=1.2, calibration_checked="2026-03-01")
    assert conn.execute("SELECT usb_serial, valve_ul_per_ms FROM rigs").fetchall() == [("A1B2", 1.2)]
    with pytest.raises(RecordError, match="valve_ul_per_ms"):
        ensure_rig(conn, "box2", valve_ul_per_ms=-1)
    pid = ensure_protocol(conn, "p", 1, PROTOCOL)
    assert ensure_protocol(conn, "p", 1, PROTOCOL) == pid
    with pytest.raises(RecordError, match="bump"):
        ensure_protocol(conn, "p", 1, PROTOCOL + "\n# changed")
    assert ensure_protocol(conn, "p", 2, PROTOCOL + "\n# changed") != pid


def test_check_in_warns_for_an_unusual_box_and_the_session_follows_the_animal(tmp_path):
    conn = store(tmp_path)
    ensure_animal(conn, "heron", usual_boxes=["box1", "box2"])
    pid = ensure_protocol(conn, "p", 1, PROTOCOL)
    usual, warning = check_in(conn, animal="heron", rig="box1", operator="ana", protocol_id=pid,
                              weight_before_g=301.0, stage="final", when=1000.0)
    assert warning is None
    check_out(conn, usual, when=4000.0)
    other, warning = check_in(conn, animal="heron", rig="box7", operator="ana", protocol_id=pid, when=5000.0)
    assert warning == "heron is usually in box1, box2, not box7"
    second, _ = check_in(conn, animal="wren", rig="box1", operator="bo", protocol_id=pid, when=6000.0)
    rows = conn.execute("SELECT id, animal, rig, ended_at, protocol_version FROM sessions ORDER BY id").fetchall()
    assert rows == [(usual, "heron", "box1", 4000.0, 1), (other, "heron", "box7", None, 1),
                    (second, "wren", "box1", None, 1)]
    assert conn.execute("SELECT operator, weight_before_g, stage, warning FROM checkins WHERE session_id = ?",
                        (other,)).fetchone() == ("ana", None, None, warning)
    with pytest.raises(RecordError, match="already checked out"):
        check_out(conn, usual)
    with pytest.raises(RecordError, match="operator"):
        check_in(conn, animal="heron", rig="box1", operator=" ", protocol_id=pid)


def test_conditions_and_exclusion_keep_data_but_leave_sessions_out_of_the_curve(tmp_path):
    conn = store(tmp_path)
    ids = import_sessions(conn, tmp_path, "heron", [2, 8, 8, 9])
    add_condition(conn, ids[1], what="muscimol M1", dose="0.5 µg", volume_ul=0.5, operator="ana",
                  at="2026-03-03T08:30:00+01:00")
    add_condition(conn, ids[2], what="saline M1", volume_ul=0.5, sham=True, operator="ana",
                  at="2026-03-04T08:30:00+01:00")
    with pytest.raises(RecordError, match="at"):
        add_condition(conn, ids[2], what="x", operator="ana", at="2026-03-04 08:30")
    assert [c["what"] for c in conditions_of(conn, ids[1])] == ["muscimol M1"]
    before = report(conn, "heron")["animals"][0]
    assert before["plateau"]["session"] == 2
    exclude_session(conn, ids[1], "muscimol session", "ana")
    after = report(conn, "heron")["animals"][0]
    assert after["sessions"][1]["excluded"] and after["sessions"][1]["exclusion_reason"] == "muscimol session"
    assert after["sessions"][1]["trials"] == 10  # kept
    assert after["sessions"][1]["conditions"] == ["muscimol M1"] and after["sessions"][2]["conditions"] == ["saline M1 (sham)"]
    assert after["plateau"]["session"] == 3  # session 2 is out of the curve
    assert {"session": 2, "why": after["plateau"]["left_out"][0]["why"]} == after["plateau"]["left_out"][0]
    with pytest.raises(RecordError, match="reason"):
        exclude_session(conn, ids[0], "", "ana")


def test_decisions_table_refuses_update_and_delete(tmp_path):
    conn = store(tmp_path)
    conn.execute("INSERT INTO decisions (seq, prev_hash, algorithm, decision, animal, operator, reason, time, "
                 "disagrees_with_rule, payload, hash) VALUES (1, 'x', 'sha256', 'deferred', 'a', 'o', 'r', 't', 0, "
                 "'{}', 'h')")
    for sql in ("UPDATE decisions SET reason = 'edited'", "DELETE FROM decisions"):
        with pytest.raises(sqlite3.IntegrityError, match="append-only"):
            conn.execute(sql)
    assert conn.execute("SELECT reason FROM decisions").fetchall() == [("r",)]


def test_fit_cache_block_and_its_fingerprint(tmp_path):
    conn = store(tmp_path)
    ids = import_sessions(conn, tmp_path, "heron", [2, 8])
    assert cached_block(conn, "heron", 2)["status"] == "not fitted"
    fingerprint = data_fingerprint(conn, "heron")
    block = {"session": 2, "estimate": 0.4, "low": 0.2, "high": 0.6, "status": "estimated"}
    save_fit(conn, "heron", fingerprint=fingerprint, params={"a_f": 0.9}, block=block, sessions=[block])
    assert report(conn, "heron")["animals"][0]["consolidation"] == {**block, "current": True}
    exclude_session(conn, ids[0], "cable fault", "ana")
    assert data_fingerprint(conn, "heron") != fingerprint
    assert cached_block(conn, "heron", 2) == {**block, "current": False}
    with pytest.raises(ValueError, match="estimate"):
        save_fit(conn, "heron", fingerprint="f", params={}, block={"session": 1}, sessions=[])


def test_care_log_feeds_the_daily_ledger(tmp_path):
    conn = store(tmp_path)
    import_sessions(conn, tmp_path, "heron", [4], trials=10)  # 4 rewards x 30 µL (the protocol's reward_ul)
    ensure_animal(conn, "heron", baseline_weight_g=25.0)
    add_weighing(conn, "heron", at="2026-03-02T08:00:00+01:00", grams=21.3, by="ana")
    add_supplement(conn, "heron", at="2026-03-02T16:00:00+01:00", ml=0.5, by="bo")
    add_note(conn, "heron", at="2026-03-02T16:05:00+01:00", by="bo", text="coat scruffy")
    with pytest.raises(RecordError, match="animal"):
        add_weighing(conn, "nobody", at="2026-03-02T08:00:00+01:00", grams=20, by="ana")
    with pytest.raises(RecordError, match="time"):
        add_supplement(conn, "heron", at="2026-03-02 16:00", ml=0.5, by="bo")
    care = animal_care(conn, "heron", CareConfig())
    assert care.sessions[0].earned_ul == 4 * 30 and care.sessions[0].unconfirmed == 0
    summary = day_summary(care, date(2026, 3, 2), CareConfig(),
                          now=datetime(2026, 3, 2, 18, 0, tzinfo=timezone(timedelta(hours=1))))
    # hand arithmetic: 21.3 g against a 25.0 g baseline = 85.2 %
    assert summary.percent_of_baseline == pytest.approx(85.2)
    assert summary.total_ml == pytest.approx(0.12 + 0.5)
    assert summary.notes == ("coat scruffy",)


def test_the_weight_taken_at_check_in_is_a_weighing_of_the_day(tmp_path):
    conn = store(tmp_path)
    ensure_animal(conn, "heron", baseline_weight_g=25.0)
    when = datetime(2026, 3, 2, 9, 0, tzinfo=timezone.utc).timestamp()
    check_in(conn, animal="heron", rig="box1", operator="ana", protocol_id=None, weight_before_g=21.3, when=when)
    care = animal_care(conn, "heron", CareConfig())
    assert [(w.grams, w.by) for w in care.weighings] == [(21.3, "ana")]
    summary = day_summary(care, date(2026, 3, 2), CareConfig(),
                          now=datetime(2026, 3, 2, 18, 0, tzinfo=timezone.utc))
    # hand arithmetic: 21.3 g against a 25.0 g baseline = 85.2 %
    assert summary.percent_of_baseline == pytest.approx(85.2)


def test_cached_report_entry_is_used_only_while_its_data_are_unchanged(tmp_path):
    conn = store(tmp_path)
    ids = import_sessions(conn, tmp_path, "heron", [2, 8, 8, 9])
    fresh = build_entry(conn, "heron")
    refresh_cache(conn, "heron")
    cached = json.loads(conn.execute("SELECT entry FROM report_cache").fetchone()[0])
    assert cached == json.loads(json.dumps(fresh))
    conn.execute("UPDATE report_cache SET entry = json_set(entry, '$.protocol', 'from the cache')")
    assert report(conn, "heron")["animals"][0]["protocol"] == "from the cache"  # current: read, not rebuilt
    exclude_session(conn, ids[1], "muscimol session", "ana")  # the data change: the cache is stale
    entry = report(conn, "heron")["animals"][0]
    assert entry["protocol"] == "two-press 650 ms" and entry["sessions"][1]["excluded"]
    add_condition(conn, ids[3], what="saline", operator="ana", at="2026-03-05T08:00:00+01:00")
    refresh_cache(conn, "heron")
    assert report(conn, "heron")["animals"][0]["sessions"][3]["conditions"] == ["saline"]
