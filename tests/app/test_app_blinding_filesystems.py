"""Blinding keys on file systems without hard links (FAT, exFAT, some network shares: os.link
raises there, Python's os docs): the key is still made once, kept, and never overwritten."""

from __future__ import annotations

import errno
import json
import os

import pytest

from monitor.app.services import blinding


@pytest.fixture
def no_hard_links(monkeypatch):
    def refuse(src, dst, *args, **kwargs):
        raise OSError(errno.EPERM, "Operation not permitted", str(dst))
    monkeypatch.setattr(blinding.os, "link", refuse)


def test_the_key_is_made_once_without_hard_links(tmp_path, no_hard_links):
    db = tmp_path / "store.sqlite3"
    first = blinding.cohort_key(db, "c1", ["early", "late"])
    path = blinding.key_file(db, "c1")
    secret = json.loads(path.read_text())["secret"]
    again = blinding.cohort_key(db, "c1", ["early", "late"])
    assert json.loads(path.read_text())["secret"] == secret
    assert again == first
    assert [p.name for p in path.parent.iterdir()] == [path.name]      # no draft left behind
    if os.name == "posix":
        assert oct(os.stat(path).st_mode & 0o777) == "0o600"


def test_a_key_another_process_made_first_is_kept(tmp_path, no_hard_links):
    db = tmp_path / "store.sqlite3"
    blinding.cohort_key(db, "c1", ["early", "late"])
    path = blinding.key_file(db, "c1")
    before = path.read_bytes()
    blinding._create_exclusively(path, '{"format": "someone else"}')
    assert path.read_bytes() == before
