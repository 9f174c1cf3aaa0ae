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
