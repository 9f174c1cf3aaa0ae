"""The stage frozen in a manipulation entry: figures as of the last included session before it."""

from __future__ import annotations

from monitor.app.services.effects import stage_at
from monitor.store.db import open_store
from monitor.store.fits import save_fit


def _entry(plateau_session: int | None) -> dict:
    sessions = [{"index": i, "trials": 100 * i, "hit_rate": 0.1 * i, "excluded": i == 5, "protocol_version": 1}
                for i in range(1, 8)]
    return {"animal": "heron", "protocol": "p", "protocol_version": 1, "sessions": sessions,
            "plateau": {"reached": plateau_session is not None, "session": plateau_session}}


def test_counts_since_plateau_stop_at_the_last_included_session_before(tmp_path):
    conn = open_store(tmp_path / "s.sqlite3")
    stage = stage_at(conn, _entry(2), first_affected=7)
    # sessions 3, 4 and 6 follow the plateau (5 is excluded): the convention of eligibility_figures
    assert stage["session"] == 6 and stage["plateau_session"] == 2
    assert stage["sessions_since_plateau"] == 3 and stage["trials_since_plateau"] == 300 + 400 + 600
    assert stage["slow_status"] == "not fitted" and stage["slow_estimate"] is None and not stage["fit_current"]


def test_a_plateau_judged_at_or_after_the_manipulation_was_not_there_yet(tmp_path):
    conn = open_store(tmp_path / "s.sqlite3")
    stage = stage_at(conn, _entry(4), first_affected=4)
    assert stage["session"] == 3 and not stage["plateau_reached"] and stage["sessions_since_plateau"] is None


def test_the_fraction_comes_from_the_fit_at_that_session(tmp_path):
    conn = open_store(tmp_path / "s.sqlite3")
    conn.execute("BEGIN IMMEDIATE")
    save_fit(conn, "heron", fingerprint="x", params={},
             block={"session": 7, "estimate": 0.8, "low": 0.6, "high": 0.9, "status": "estimated"},
             sessions=[{"session": 6, "estimate": 0.7, "low": 0.5, "high": 0.85, "status": "estimated"},
                       {"session": 7, "estimate": 0.8, "low": 0.6, "high": 0.9, "status": "estimated"}])
    conn.execute("COMMIT")
    stage = stage_at(conn, _entry(2), first_affected=7)
    assert (stage["slow_estimate"], stage["slow_low"], stage["slow_high"]) == (0.7, 0.5, 0.85)
    assert stage_at(conn, _entry(2), first_affected=6)["slow_status"] == "no estimate at session 4"
