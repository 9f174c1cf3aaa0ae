"""An eligibility window on a simulated animal (mock_rig), from its imported sessions and the report.

The demo's "plateaued, not consolidated" animal trains 20 sessions. Its
sessions go through `rigside import` and `rigside report`; then the rule is
judged as of each session k, with only sessions 1..k known. The sessions
where the window must be open are derived by hand from the rule's text and
the report's plateau session p, not from the code under test: the plateau
rule (3 consecutive sessions at or above the hit-rate threshold, the first of
them is the plateau session) is first known at session p + 2; the group asks
for at most 4 sessions after the plateau, so the window is open at sessions
p + 2, p + 3, p + 4 and has passed from p + 5 on.
"""

from __future__ import annotations

import json

import pytest

from drivers.config import TomlFile
from mock_rig.demo import STAGES, prepare_demo
from monitor.app.cli import main
from monitor.core.eligibility.rules import parse_eligibility
from monitor.core.eligibility.from_report import figures_from_report
from monitor.core.eligibility.verdict import IN_WINDOW, TRAINING, WINDOW_PASSED, evaluate

pytestmark = pytest.mark.slow  # windows, subprocesses or simulated histories: seconds per test

RULE = """
[eligibility]
cohort = "orchard-26a"

[eligibility.groups.early]
label = "plateaued, not consolidated"
max_sessions_since_plateau = 4
"""


@pytest.fixture(scope="module")
def report(tmp_path_factory) -> dict:
    folder = tmp_path_factory.mktemp("cohort")
    stages = (STAGES[0][:2] + (1,), STAGES[1][:2] + (1,), STAGES[2])  # the third animal as in the demo
    animal = next(d for d in prepare_demo(folder / "history", stages=stages) if d.animal.name == STAGES[2][1])
    db = folder / "store.sqlite3"
    assert main(["import", *map(str, animal.session_files), "--protocol", str(animal.protocol_path),
                 "--db", str(db), "--no-fit"]) == 0
    return {"db": db, "animal": animal.animal.name}


def test_the_window_opens_and_passes_at_the_sessions_the_rule_implies(report, capsys):
    capsys.readouterr()
    assert main(["report", "--db", str(report["db"]), "--animal", report["animal"], "--json"]) == 0
    entry = json.loads(capsys.readouterr().out)["animals"][0]
    assert entry["plateau"]["reached"] and entry["plateau"]["rule"] == "consecutive_sessions"
    p, sessions = entry["plateau"]["session"], entry["sessions"]
    assert len(sessions) == 20 and p + 5 <= 20
    doc = TomlFile(RULE, "rule.toml")
    rule = parse_eligibility(doc.data["eligibility"], doc, protocol_name=entry["protocol"])
    kinds = {}
    for k in range(1, len(sessions) + 1):
        known = k >= p + 2                       # the plateau is first known two sessions after it
        as_of_k = {**entry, "sessions": sessions[:k],
                   "plateau": {"reached": known, "session": p if known else None, "rule": "consecutive_sessions"}}
        kinds[k] = evaluate(rule, figures_from_report(as_of_k)).kind
    expected = {k: TRAINING if k < p + 2 else IN_WINDOW if k <= p + 4 else WINDOW_PASSED
                for k in range(1, len(sessions) + 1)}
    assert kinds == expected
