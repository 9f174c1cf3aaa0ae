"""The window's random draw: the decision dialog draws through monitor.app.services.assigning and records codes when blinded."""

from __future__ import annotations

import hashlib
from datetime import datetime

import pytest

from monitor.store.db import open_store
from monitor.store.decisions import entries
from monitor.ui.decision_dialog import DecisionDialog
from monitor.ui.decision_history import DecisionHistory
from fixtures.protocols import protocol_toml
from fixtures.stores import imported_store, rewarded_session
from fixtures.windows import window_over

pytestmark = pytest.mark.slow  # windows, subprocesses or simulated histories: seconds per test

PROTOCOL = protocol_toml(reward_ul=30, extra="""
[eligibility]
cohort = "shore"
blinded = true

[eligibility.groups.drug]
label = "muscimol"
plateau = false
min_hit_rate = 0.0

[eligibility.groups.vehicle]
label = "saline"
plateau = false
min_hit_rate = 0.0
""")


@pytest.fixture
def app(qapp, tmp_path):
    start = datetime.now().astimezone().replace(microsecond=0)
    db = imported_store(tmp_path, {"heron_s01.rsw": rewarded_session(start, 5)}, PROTOCOL, "--no-fit")
    with window_over(db) as (controller, window):
        yield controller, window, db


def test_the_dialog_draws_a_code_at_random_and_records_it(app, qtbot, tmp_path):
    controller, window, db = app
    records = controller.decisions_and_care
    qtbot.waitUntil(lambda: "heron" in records.verdicts, timeout=20000)
    # blinded: the page's verdict line and the window alerts name codes, never the groups
    alerts = " ".join(a.text for a in controller.alert_book.alerts())
    assert "muscimol" not in records.verdicts["heron"].state + alerts and "G-" in records.verdicts["heron"].state
    assert "window for G-" in alerts
    records.open_decision("heron")
    qtbot.waitUntil(lambda: isinstance(records.dialog, DecisionDialog), timeout=20000)
    dialog = records.dialog
    assert all(text.startswith("G-") for _, text in dialog.view.groups) and dialog.view.can_draw
    dialog.decision.setCurrentText("assigned")
    dialog.draw_button.click()
    qtbot.waitUntil(lambda: dialog.drawn, timeout=20000)
    code = dialog.group.currentData()
    assert code.startswith("G-") and f"group code {code}" in dialog.draw_text.text()
    dialog.reason.setText("plateau reached")
    dialog.operator.setText("ana")
    dialog.planned.setText("infusion, 0.5 µL per side")
    dialog.planned_date.setText("2026-03-10")
    dialog.resize(900, 720)
    dialog.grab().save(str(tmp_path / "drawn.png"))
    assert dialog.try_accept()
    conn = open_store(db, readonly=True)
    try:
        qtbot.waitUntil(lambda: len(entries(conn, "heron")) == 1, timeout=20000)
        d = entries(conn, "heron")[0].decision
        seed = conn.execute("SELECT seed FROM assignment_plans WHERE cohort = 'shore'").fetchone()[0]
    finally:
        conn.close()
    assert (d.decision, d.group, d.group_code, d.assignment_method, d.assignment_seed) == (
        "assigned", None, code, "blocks-sha256-v1", seed)
    # the first animal gets entry 0 of block 0, redone with plain hashlib (Python's SHA-256; definition in
    # docs/eligibility.md): the codes ordered by SHA-256 of "seed:block:0:CODE:0"
    codes = [value for value, _ in dialog.view.groups]
    first = min(codes, key=lambda c: hashlib.sha256(f"{seed}:block:0:{c}:0".encode()).hexdigest())
    assert code == first
    records.open_history("heron")
    qtbot.waitUntil(lambda: isinstance(records.dialog, DecisionHistory), timeout=20000)
    history = records.dialog
    shown = " ".join(history.table.item(0, c).text() for c in range(history.table.columnCount()))
    assert code in shown and "muscimol" not in shown and "drug" not in shown
