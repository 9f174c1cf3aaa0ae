"""No internal string reaches a person: every widget's text in a demo run, and the command line's error paths.

Rejected: program identifiers (snake_case words, `>=` / `<=`), enum and exception texts (`[Errno`,
`Traceback`, `Connection.`), and counts with the wrong number (`1 entries`) — common practice for
user-facing text.
"""

from __future__ import annotations

import json
import os
import re
import subprocess
import sys

import pytest

from monitor.app.cli import main

REJECT = [re.compile(p) for p in (
    r"\b[a-z]+_[a-z0-9_]+\b",          # an identifier such as hit_rate or no_record_today
    r"[<>]=", r"\[Errno", r"Traceback", r"\b(Connection|Severity|StoreHealth)\.", r"\bNone\b",
    r"\b1 (entries|sessions|trials|alerts|presses|rigs)\b", r"worst: ", r"\w not open yet")]


def internal(text: str) -> list[str]:
    """The rejected patterns found in `text` (file paths, which a person typed or chose, set aside)."""
    words = re.sub(r"\S*[/\\]\S*", "", text)
    return [p.pattern for p in REJECT if p.search(words)]


WALK_IN_CHILD = """
import json, sys
from pathlib import Path
from monitor.app.window.demo import DemoOptions, run

def texts(app):
    from PySide6.QtWidgets import (QAbstractButton, QComboBox, QGroupBox, QLabel, QListWidget, QTabWidget,
                                   QTableWidget, QWidget)
    import pyqtgraph as pg
    out = []
    for top in app.topLevelWidgets():
        if not top.isVisible():
            continue
        out.append(top.windowTitle())
        for w in [top, *top.findChildren(QWidget)]:
            if isinstance(w, QLabel): out.append(w.text())
            if isinstance(w, QAbstractButton): out.append(w.text())
            if isinstance(w, QGroupBox): out.append(w.title())
            if isinstance(w, QComboBox): out += [w.itemText(i) for i in range(w.count())]
            if isinstance(w, QListWidget): out += [w.item(i).text() for i in range(w.count())]
            if isinstance(w, QTableWidget):
                out += [w.item(r, c).text() for r in range(w.rowCount()) for c in range(w.columnCount())
                        if w.item(r, c)]
            if isinstance(w, QTabWidget): out += [w.tabText(i) for i in range(w.count())]
            if isinstance(w, pg.PlotWidget):
                item = w.getPlotItem()
                out += [item.getAxis(s).labelText for s in ("bottom", "left")]
                if item.legend is not None:
                    out += [label.text for _, label in item.legend.items]
    return out

def inspect(controller, window):
    from PySide6.QtWidgets import QApplication
    from monitor.app.window.demo import wait_for
    from monitor.ui.tile import tile_texts
    app = QApplication.instance()
    seen = [t for rig in controller.board.rigs() for t in tile_texts(controller.board.state(rig))]
    seen += texts(app)
    page = window.open_animal("cedar")
    wait_for(lambda: "cedar" in controller.history_parts, 120, app)
    for i in range(page.sections.count()):
        page.sections.setCurrentIndex(i)
        app.processEvents()
        seen += texts(app)
    records = controller.decisions_and_care
    for opener in (lambda: records.open_decision("cedar"), lambda: records.open_history("cedar")):
        before = records.dialog
        opener()
        wait_for(lambda: records.dialog not in (None, before) and records.dialog.isVisible(), 60, app)
        seen += texts(app)
        records.dialog.close()
    records.open_care()
    wait_for(lambda: records.care_panel is not None and records.care_panel.isVisible(), 60, app)
    wait_for(lambda: False, 2.0, app)
    seen += texts(app)
    for opener in (window.open_check_in, window.open_give):
        opener()
        app.processEvents()
        seen += texts(app)
        window.dialog.close()
    print(json.dumps(sorted({t for t in seen if t})))

run(DemoOptions(speed=20, seconds=4, headless=True, folder=Path(sys.argv[1]), fit=False, history=(1, 2, 3, 4)),
    inspect)
"""


@pytest.mark.slow  # a demo run in the window
@pytest.mark.skipif(not hasattr(os, "openpty"), reason="the demo's pseudo-terminals are POSIX only")
def test_every_widget_text_of_a_demo_run_is_plain_words(tmp_path):
    # in a child process: a whole application run must not leave Qt state behind for other tests
    result = subprocess.run([sys.executable, "-c", WALK_IN_CHILD, str(tmp_path)], capture_output=True, text=True,
                            timeout=600, env={**os.environ, "QT_QPA_PLATFORM": "offscreen"})
    assert result.returncode == 0, result.stderr[-2000:]
    seen = json.loads(result.stdout.strip().splitlines()[-1])
    assert len(seen) > 100                           # the walk reached the pages, dialogs and care window
    assert any("Learning curve" in t for t in seen) and any("Care" in t for t in seen)
    bad = {t: internal(t) for t in seen if internal(t)}
    assert bad == {}


def run_cli(capsys, *args) -> tuple[int, str]:
    try:
        code = main([str(a) for a in args])
    except SystemExit as exc:  # argparse's own refusals
        code = exc.code
    return code, capsys.readouterr().err


def test_command_line_errors_are_one_plain_line(tmp_path, capsys):
    rigs = tmp_path / "rigs.toml"
    rigs.write_text('[[rig]]\nname = "box-02"\nsource = "file"\npath = "box2.log"\nprotocol = "missing.toml"\n')
    db = tmp_path / "lab.sqlite3"
    cases = [
        ("window", "--rigs", rigs, "--db", db, "--seconds", "1"),
        ("report", "--db", db, "--animal", "nobody", "--json"),
        ("decide", "--db", db, "--animal", "nobody", "--decision", "eligible", "--operator", "a", "--reason", "r"),
        ("care", "weigh", "--db", db, "--animal", "nobody", "--grams", "-3", "--by", "a"),
        ("unattended", "give", "--db", db, "--rig", "box-02", "--started", "2026-01-01 09:00", "--animal", "a",
         "--operator", "a", "--reason", "r"),
        ("import", tmp_path / "none.rsw", "--protocol", tmp_path / "none.toml", "--db", db),
        ("export", "trials", "--db", tmp_path / "no" / "such" / "dir" / "x.sqlite3", "--csv", tmp_path / "t.csv"),
    ]
    for case in cases:
        code, err = run_cli(capsys, *case)
        assert code in (1, 2), (case, code, err)
        assert err.count("\n") == 1, (case, err)
        assert internal(err) == [], (case, err)
    code, err = run_cli(capsys, "window", "--rigs", rigs, "--db", db, "--seconds", "1")
    assert "missing.toml" in err and "box-02" in err and "protocol" in err     # the file and the key named
