"""The cohort effects window and the manipulation dialog (pytest-qt, offscreen)."""

from __future__ import annotations

import numpy as np
import pytest

from monitor.core.effects.cohort import Point, group_table, trend
from monitor.ui.effects_view import EffectsView
from monitor.ui.manipulation_dialog import ManipulationDialog

pytest.importorskip("pytestqt")


def _document(coded: bool) -> dict:
    rng = np.random.default_rng(2)
    rows, points = [], []
    for i in range(12):
        role = "control" if i % 3 == 2 else "test"
        group = ("G-7Q" if coded else "early") if i % 2 else ("G-K4" if coded else "late")
        x = 0.3 + 0.05 * i
        y = (0.6 * x - 0.55 if role == "test" else 0.0) + rng.normal(0, 0.03)
        rows.append({"seq": i + 1, "animal": f"a{i}", "group": group, "group_shown_as": "code" if coded else "name",
                     "role": role, "duration": "acute",
                     "stage": {"slow_estimate": None if i == 11 else x, "slow_low": x - 0.1, "slow_high": x + 0.1},
                     "what": "muscimol" if role == "test" else "saline", "session": 10,
                     "effect": {"baseline_sessions": [7, 8, 9], "baseline_range": {"hit_rate": [0.55, 0.61]},
                                "vs_baseline": {"hit_rate": {"effect": y, "low": y - 0.05, "high": y + 0.05}},
                                "vs_control": {"hit_rate": {"effect": y - 0.01, "low": y - 0.07, "high": y + 0.05}}
                                if role == "test" and i < 6 else None,
                                "recovery": {"recovered": False, "followed": 2, "session": None, "sessions": None}
                                if i == 4 else None}})
        points.append(Point(f"a{i}", group, role, x, None, None, y, None, None))
    fitted = trend([p.x for p in points if p.role == "test"], [p.y for p in points if p.role == "test"])
    fit, low, high = fitted.line([0, 0.5, 1])
    line = {"x": [0, 0.5, 1], "fit": list(fit), "low": list(low), "high": list(high)}
    tests = [p for p in points if p.role == "test" and int(p.animal[1:]) < 6]
    return {"manipulations": rows, "trend": {"hit_rate": {"test": {**fitted.to_dict(), "line": line}, "control": None}},
            "groups": {"hit_rate": [r.to_dict() for r in group_table(points)]},
            "trend_vs_control": {"hit_rate": {"test": None, "control": None}},
            "groups_vs_control": {"hit_rate": [r.to_dict() for r in group_table(tests)]}}


def test_cohort_view_draws_points_bars_trend_and_table(qtbot, tmp_path):
    view = EffectsView(_document(coded=True))
    qtbot.addWidget(view)
    view.resize(1100, 720)
    view.show()
    assert "codes" in view.blinding.text() and "blinded" in view.blinding.text()
    assert "1 manipulation(s) without a slow-state estimate" in view.note.text()
    assert view.table.rowCount() == 4 + 1     # 2 groups x (test, control), and the trend's slope
    assert view.table.item(4, 3).text().startswith("+0.")    # the simulated slope 0.6 is positive
    labels = [i for i in view.items if hasattr(i, "textItem")]
    assert len(labels) == 11 and all("G-" in i.textItem.toPlainText() for i in labels)
    assert view.each.rowCount() == 12 and view.each.item(0, 8).text().startswith("-0.")
    assert "[" in view.each.item(0, 8).text() and view.each.item(0, 9).text() == "0.550 to 0.610"
    view.grab().save(str(tmp_path / "effects.png"))
    view.tables.setCurrentIndex(1)
    view.grab().save(str(tmp_path / "effects-each.png"))
    view.against.setCurrentIndex(1)       # against the control sessions: the acute tests that have one
    assert view.table.rowCount() == 2 and "control session" in view.plot.getAxis("left").labelText
    assert sum(1 for i in view.items if hasattr(i, "textItem")) == 4
    view.against.setCurrentIndex(0)
    view.measure.setCurrentIndex(1)      # a measure without data: no points, no crash
    assert view.table.rowCount() == 0 and view.each.item(0, 8).text() == "—"


def test_cohort_view_shows_names_when_unblinded_and_one_cohort_at_a_time(qtbot):
    other = _document(coded=True)
    view = EffectsView(_document(coded=False), cohorts={"orchard": _document(coded=False), "shore": other})
    qtbot.addWidget(view)
    assert "names" in view.blinding.text()
    assert {view.table.item(r, 0).text() for r in range(4)} == {"early", "late"}
    view.cohort.setCurrentText("shore")
    assert view.document is other and "codes" in view.blinding.text()
    assert EffectsView(other, cohorts={"shore": other}).cohort.isHidden() and not view.cohort.isHidden()


def test_manipulation_dialog_refuses_contradictions_and_emits_a_request(qtbot):
    dialog = ManipulationDialog("alder", [(1, "1 · 2026-03-02"), (2, "2 · 2026-03-03"), (3, "3 · 2026-03-04")],
                                operator="kim")
    qtbot.addWidget(dialog)
    got = []
    dialog.submitted.connect(got.append)
    dialog.duration.setCurrentIndex(1)          # lasting ...
    dialog.control_session.setCurrentIndex(1)   # ... with a control session: refused
    assert not dialog.try_accept()
    text = dialog.problem_line.text()
    assert "What" in text and "only an acute test" in text and "Reason" in text
    dialog.duration.setCurrentIndex(0)
    dialog.what.setText("muscimol M1")
    dialog.reason.setText("planned day")
    assert dialog.try_accept()
    r = got[0]
    assert (r.duration, r.role, r.session, r.control_session, r.group) == ("acute", "test", 3, 1, None)
