"""Unknown event words get one code each even when the live writer and an import add words at the same time."""

from __future__ import annotations

import sqlite3
import time

from drivers.status import Batch
from drivers.wire import WireDecoder, encode_event, encode_header
from monitor.store import db
from monitor.store.importer import import_file
from monitor.store.writer import StoreWriter

PROTOCOL = '[protocol]\nname = "p"\nversion = 1\ntask = "two_press"\ntarget_ms = 650\ntolerance = 0.2\n'


def test_writer_settles_its_new_codes_against_words_an_import_added(tmp_path):
    path = tmp_path / "store.sqlite3"
    writer = StoreWriter(path, commit_interval_s=60.0)  # nothing commits before stop()
    writer.start()
    source = writer.call(lambda c: db.register_source(c, "serial", "/dev/x", "box1"))
    session = writer.call(lambda c: db.start_session(c, source, "heron", "box1", "p", 1, PROTOCOL))
    records = WireDecoder().feed(encode_event(1, "alpha_word") + encode_event(2, "lever_down"))
    writer.submit(Batch(records, time.time()), source_id=source, session_id=session, live=True)

    other = db.open_store(path)  # another process imports a file with a different unknown word
    data = encode_header(start="2026-03-02T09:00:00+01:00") + encode_event(5, "beta_word")
    file = tmp_path / "wren_s01.rsw"
    file.write_bytes(data)
    other.execute("BEGIN IMMEDIATE")
    import_file(other, file, data, protocol_text=PROTOCOL, protocol_name="p", protocol_version=1)
    other.execute("COMMIT")
    other.close()

    assert writer.stop() is True  # every row stored, no code clash
    conn = sqlite3.connect(path)
    rows = conn.execute("SELECT s.animal, c.name FROM events AS e JOIN event_codes AS c ON c.code = e.code "
                        "JOIN sessions AS s ON s.id = e.session_id ORDER BY e.rowid").fetchall()
    assert sorted(rows) == [("heron", "alpha_word"), ("heron", "lever_down"), ("wren", "beta_word")]
    codes = conn.execute("SELECT name, code FROM event_codes WHERE known = 0 ORDER BY code").fetchall()
    assert [name for name, _ in codes] == ["beta_word", "alpha_word"]


def test_a_file_parsed_before_another_process_added_its_word_is_stored_under_the_stores_code(tmp_path):
    from monitor.store.importer import event_codes, parse_file, store_parsed

    path = tmp_path / "store.sqlite3"
    conn = db.open_store(path)
    data = encode_header(start="2026-03-02T09:00:00+01:00") + encode_event(5, "gamma_word") + encode_event(9, "delta")
    file = tmp_path / "wren_s01.rsw"
    file.write_bytes(data)
    parsed = parse_file(file, data, protocol_text=PROTOCOL, codes=event_codes(conn))  # worker side: no database
    other = db.open_store(path)  # meanwhile another process stores "delta" under the first free code
    other.execute("INSERT INTO event_codes (code, name, known) VALUES (1000, 'delta', 0)")
    other.close()
    conn.execute("BEGIN IMMEDIATE")
    store_parsed(conn, parsed, protocol_text=PROTOCOL, protocol_name="p", protocol_version=1)
    conn.execute("COMMIT")
    rows = conn.execute("SELECT e.raw_time, c.name FROM events AS e JOIN event_codes AS c ON c.code = e.code "
                        "ORDER BY e.rowid").fetchall()
    assert rows == [(5, "gamma_word"), (9, "delta")]  # the lines as written in the file above
    assert dict(conn.execute("SELECT name, code FROM event_codes WHERE known = 0")) == {"delta": 1000,
                                                                                    "gamma_word": 1001}


def test_the_live_writer_and_an_import_store_the_same_rows_for_the_same_bytes(tmp_path):
    data = (encode_header(start="2026-03-02T09:00:00+01:00") + b"# a comment\n" + encode_event(5, "lever_down", 1)
            + b"12 9lives\n" + encode_event(20, "note", "left door open") + encode_event(30, "zeta_word", "x"))
    file = tmp_path / "wren_s01.rsw"
    file.write_bytes(data)
    imported = db.open_store(tmp_path / "import.sqlite3")
    imported.execute("BEGIN IMMEDIATE")
    import_file(imported, file, data, protocol_text=PROTOCOL, protocol_name="p", protocol_version=1)
    imported.execute("COMMIT")
    writer = StoreWriter(tmp_path / "live.sqlite3")
    writer.start()
    source = writer.call(lambda c: db.register_source(c, "file", str(file), "box1"))
    session = writer.call(lambda c: db.start_session(c, source, "wren", "box1", "p", 1, PROTOCOL))
    decoder = WireDecoder()
    writer.submit(Batch(decoder.feed(data) + decoder.close(), time.time()), source_id=source, session_id=session,
                  live=False)
    assert writer.stop() is True
    live = sqlite3.connect(tmp_path / "live.sqlite3")
    events = ("SELECT e.segment, e.line, e.t_us, e.raw_time, c.name, e.value, e.wall FROM events AS e "
              "JOIN event_codes AS c ON c.code = e.code ORDER BY e.rowid")
    raw = "SELECT line, byte_offset, kind, reason, raw FROM raw_lines WHERE kind != 'notice' ORDER BY rowid"
    assert live.execute(events).fetchall() == imported.execute(events).fetchall()
    assert live.execute(raw).fetchall() == imported.execute(raw).fetchall()
    # what the file above says, line by line: events at lines 3, 5, 6; line 4 is not wire format
    assert [r[1:5] for r in live.execute(events)] == [(3, 5, 5, "lever_down"), (5, 20, 20, "note"),
                                                     (6, 30, 30, "zeta_word")]
    assert [r[2] for r in live.execute(raw)] == ["header", "comment", "malformed"]
