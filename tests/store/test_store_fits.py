"""The fit cache reads the fit of the data as they are now, whatever order fits were saved in (monitor.store.fits)."""

from __future__ import annotations

from monitor.app.cli import main
from monitor.store.db import open_store
from monitor.store.fits import cached_block, data_fingerprint, has_current_fit, latest_fit, save_fit


def block(estimate: float) -> dict:
    return {"session": 2, "estimate": estimate, "low": 0.0, "high": 1.0, "status": "not constrained"}


def test_a_slower_fit_of_older_data_saved_last_does_not_hide_the_current_one(tmp_path, mock_history):
    out, _ = mock_history
    files = sorted(out.glob("alder_s*.rsw"))
    db = tmp_path / "store.sqlite3"
    protocol = str(out / "alder.protocol.toml")
    assert main(["import", *map(str, files[:2]), "--protocol", protocol, "--db", str(db), "--no-fit",
                 "--quiet"]) == 0
    conn = open_store(db)
    older = data_fingerprint(conn, "alder")   # what a fit started now would fit
    conn.close()
    assert main(["import", str(files[2]), "--protocol", protocol, "--db", str(db), "--no-fit", "--quiet"]) == 0
    conn = open_store(db)
    try:
        assert latest_fit(conn, "alder") is None and not has_current_fit(conn, "alder")
        with conn:  # the fit of all three sessions is saved first, the slower fit of two sessions after it
            save_fit(conn, "alder", fingerprint=data_fingerprint(conn, "alder"), params={}, block=block(0.3),
                     sessions=[])
            save_fit(conn, "alder", fingerprint=older, params={}, block=block(0.7), sessions=[])
        shown = cached_block(conn, "alder", 3)
        assert shown["estimate"] == 0.3 and shown["current"] and has_current_fit(conn, "alder")
        assert latest_fit(conn, "alder")["current"]
        assert main(["import", str(files[3]), "--protocol", protocol, "--db", str(db), "--no-fit",
                     "--quiet"]) == 0
        # none fits the data now: the newest fit is read, and says it is not current
        shown = cached_block(conn, "alder", 4)
        assert shown["estimate"] == 0.7 and not shown["current"] and not has_current_fit(conn, "alder")
    finally:
        conn.close()
