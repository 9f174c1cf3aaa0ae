"""Eligibility and care in the window: verdict and care lines, decisions, the care day, their alerts.

Rule: GUI thread only; every store call runs in a controller worker job.
After an animal's history loads, and every few minutes for the whole store,
each animal is judged (`animal_records.judge`) and its care day computed
(`animal_records.care_day`); the page shows the verdict and the care day in
one line each. Window changes (`window_changes`: opened, closing or opening
within the rule's `warn_sessions`, as a range of sessions, and closed) and
care alerts (supplement owed, no fluid, weight missing or low, valve open too
long, rewards with no licks...) go to the alert list, each once per day and
level; when its condition clears (the weight is logged, the supplement given)
it leaves the open list, acknowledged as "rigside (no longer true)". The decision dialog shows the judgement read when it
opened and records exactly that snapshot; "assigned" can draw the group at
random (`assigning.draw_next`, the same draw as `rigside assign`); in a
blinded cohort operators see and record only group codes. The care window logs weights, supplements,
notes and baselines through the store writer and saves the sheet as CSV or
PNG. Advisory: the approved protocol, the animal-care committee and the
veterinarian decide.
"""

from __future__ import annotations

import time
from dataclasses import replace
from datetime import date, datetime
from pathlib import Path
from typing import Any, Callable, Sequence

from PySide6.QtCore import QObject, Qt, QTimer
from PySide6.QtWidgets import QWidget

from monitor.app.services.judging import Judgement, RuleError, care_day, care_line, judge, record_decision, \
    write_care_csv
from monitor.app.live.engine import RaisedAlert
from monitor.core.alerts import ATTENTION, INFO, URGENT, Raised
from monitor.app.services.assigning import AssignError, Draw, draw_next, record_draw
from monitor.core.eligibility.assignment import BLOCKS_METHOD
from monitor.core.care.ledger import NO_RECORD, RECORDED, RUNNING, CareConfig, DaySummary
from monitor.core.eligibility.decision_log import ChainCheck, LogEntry, rule_agrees
from monitor.core.eligibility.labels import LABELS
from monitor.core.eligibility.figures import AnimalFigures
from monitor.core.eligibility.verdict import Verdict, window_changes
from monitor.app.store_access import read_job
from monitor.ui.cohort import CohortRow, CohortTable, CohortView
from monitor.ui.care_panel import LEVELS, CareEntry, CarePanel, CareRow, CareView, sheet_image
from monitor.ui.decision_dialog import DECISIONS, DecisionDialog, DecisionRequest, DecisionView
from monitor.ui.decision_history import DecisionHistory, HistoryView
from monitor.ui.models import CLEARED_BY

CHECK_EVERY_MS = 300_000     # care alerts that depend on the clock (no fluid, end of day) are re-checked this often
CARE_SEVERITY = {"notice": INFO, "warning": ATTENTION, "alert": URGENT}
WINDOW_SEVERITY = {"opened": ATTENTION, "closing": ATTENTION, "opening": INFO, "closed": INFO}
WINDOW_KIND = {"opened": "window opened", "closing": "window closing", "opening": "window may open",
               "closed": "window closed"}
LEVEL_ORDER = ("alert", "warning", "notice")
STATE_KINDS = ("no_record_today", "session_running")   # what the store cannot judge yet: a state, never an alarm



def _num(value: float | None, digits: int = 2, unit: str = "") -> str:
    return "not available" if value is None else f"{value:.{digits}f}{unit}"


def figure_lines(j: Judgement) -> tuple[tuple[str, str], ...]:
    """The frozen figures in words, with units, in the order a person reads them."""
    f = j.figures
    m = f.measures
    percent = lambda v: "not available" if v is None else f"{100 * v:.1f} %"  # noqa: E731
    slow = "not available" if f.slow_estimate is None else (
        f"{f.slow_estimate:.2f} (90 % interval {f.slow_low:.2f}–{f.slow_high:.2f}), {f.slow_status or 'no status'}")
    return (("protocol", f"{f.protocol_name} v{f.protocol_version}"),
            ("latest session", "none" if f.session is None else str(f.session)),
            ("plateau", f"reached at session {f.plateau_session}" if f.plateau_reached else "not reached"),
            (LABELS["sessions_since_plateau"], "not available" if f.sessions_since_plateau is None
             else str(f.sessions_since_plateau)),
            (LABELS["trials_since_plateau"], "not available" if f.trials_since_plateau is None
             else str(f.trials_since_plateau)),
            ("hit rate (latest session)", percent(m.get("hit_rate"))),
            ("in fixed window", percent(m.get("fixed_window_fraction"))),
            (LABELS["interval_error"], _num(m.get("interval_error"), 3)),
            (LABELS["cv"], _num(m.get("cv"), 3)),
            ("slow-state fraction (model)", slow))


def decision_view(j: Judgement, earlier: Sequence[LogEntry], operator: str = "") -> DecisionView:
    """What the decision dialog shows: the verdict, the frozen figures, the groups (codes only when blinded)."""
    groups: tuple[tuple[str, str], ...] = ()
    if j.rule is not None:
        groups = tuple((g.name, g.label) for g in j.rule.groups)
        if j.blinding is not None:
            groups = tuple(sorted(groups))      # the rule's order would tell which code is which group
    agrees = {}
    if j.rule is not None:
        for decision in DECISIONS:
            for value in ("", *(name for name, _ in groups)):
                agrees[(decision, value)] = rule_agrees(decision, value or None, j.verdict)
    rows = tuple((e.seq, f"{e.decision.decision} by {e.decision.operator}, {e.decision.time}") for e in earlier)
    can_draw, note = draw_offer(j, earlier)
    return DecisionView(j.figures.animal, j.verdict.state, j.verdict.reason, figure_lines(j), groups,
                        j.blinding is not None, agrees, j.rule is not None, rows, operator, can_draw, note)


def draw_offer(j: Judgement, earlier: Sequence[LogEntry]) -> tuple[bool, str]:
    """Whether the dialog may draw the group at random, and the sentence shown beside the button."""
    rule = j.rule
    if rule is None or len(rule.groups) < 2:
        return False, "No random draw: the protocol in force names fewer than two groups."
    if rule.assignment != BLOCKS_METHOD:
        return False, "No draw here: this cohort is dealt as a whole (rigside assign --animals ...)."
    if any(e.decision.decision == "assigned" for e in earlier):
        return False, "No draw: this animal is already assigned (record a correction instead)."
    what = "group code" if j.blinding is not None else "group"
    return True, (f"The {what} is drawn at random from the permuted blocks of cohort \"{rule.cohort_name}\" "
                  "(the seed is recorded), never from the figures.")


def draw_text(draw: Draw) -> str:
    what = "group code" if draw.blinded else "group"
    return (f"Drawn at random: {what} {draw.group} ({draw.method}, seed {draw.seed}, animal {draw.position + 1} "
            f"of cohort {draw.cohort!r}). Recorded only when you press Record decision.")


def history_view(animal: str, entries: Sequence[LogEntry], check: ChainCheck) -> HistoryView:
    """An animal's entries in log order as text, and the whole log's chain check in words."""
    rows = []
    for e in entries:
        d = e.decision
        agrees = "no rule" if d.rule_state in (None, "no eligibility rule") else (
            "no (both kept)" if d.disagrees_with_rule else "yes")
        planned = " on ".join(p for p in (d.planned_manipulation, d.planned_date) if p)
        rows.append((str(e.seq), d.time, d.decision, d.group or d.group_code or "", d.operator, d.rule_state or "",
                     agrees, d.reason, planned, "" if d.corrects is None else f"entry {d.corrects}"))
    text = (f"Decision log intact: {check.checked} {'entry' if check.checked == 1 else 'entries'}, hash chain "
            "verified." if check.ok else
            f"Decision log broken at entry {check.seq} ({check.kind}): {check.message}")
    return HistoryView(animal, tuple(rows), check.ok, text)


def eligibility_text(verdict: Verdict | None) -> str:
    return "" if verdict is None or verdict.kind == "no eligibility rule" else f"{verdict.state}. {verdict.reason}"


def care_text(summary: DaySummary) -> str:
    """The animal page's care line: the day's figures, or its state, and its alerts counted in plain words."""
    if summary.state == NO_RECORD:
        return "Care today: nothing recorded yet (no session, weighing or supplement)."
    real = [a for a in summary.alerts if a.kind not in STATE_KINDS]      # the state is said in words
    counts = [(LEVELS[level][0], sum(a.level == level for a in real)) for level in LEVEL_ORDER]
    words = ", ".join(f"{n} {word}" for word, n in counts if n)
    tail = f" — {len(real)} care {'alert' if len(real) == 1 else 'alerts'}: {words}" if real else " — no care alert"
    if summary.state == RUNNING:     # nothing is owed before the session's water is counted
        return f"Care today: {care_line(replace(summary, owed_ml=None))} (a session is running: its water " \
               f"counts when it ends){tail}"
    return f"Care today: {care_line(summary)}{tail}"


def care_row(s: DaySummary) -> CareRow:
    level = next((lv for lv in LEVEL_ORDER if any(a.level == lv for a in s.alerts)), "")
    cells = (f"{s.total_ml:.2f}", _num(s.minimum_ml), f"{s.earned_ml:.2f}", f"{s.supplement_ml:.2f}",
             "after the session" if s.state == RUNNING else "–" if s.state == NO_RECORD
             else f"{s.owed_ml:.2f}" if s.owed_ml else "0.00",
             "none" if s.weight_g is None else f"{s.weight_g:.1f}" + (
                 "" if s.weighed_on in (None, s.day) else f" ({s.weighed_on:%d %b})"),
             _num(s.percent_of_baseline, 1),
             "none" if s.last_fluid is None else f"{s.last_fluid:%H:%M}" + (
                 "" if s.last_fluid.date() == s.day else f" {s.last_fluid:%d %b}"))
    return CareRow(s.animal, level, cells, tuple((a.level, a.message) for a in s.alerts), s.notes,
                   "" if s.state == RECORDED else s.state)


def cohort_row(animal: str, stage: str | None, f: AnimalFigures | None, verdict: Verdict | None,
               care: DaySummary | None) -> CohortRow:
    """One animal's row of the cohort table: text and sort key per column (missing figures sort last)."""
    sessions = f.session if f is not None else None
    if f is None:
        plateau, plateau_key = "not judged yet", None
    elif f.plateau_reached:
        plateau, plateau_key = f"reached at session {f.plateau_session}", f.plateau_session
    else:
        plateau, plateau_key = "not reached", 10 ** 6
    if f is None or f.slow_estimate is None or f.slow_status in (None, "not fitted"):
        slow, slow_key = "no fit yet", None
    else:
        slow = f"{f.slow_estimate:.2f} ({f.slow_low:.2f}–{f.slow_high:.2f}), {f.slow_status or 'no status'}"
        slow_key = f.slow_estimate
    state = verdict.state if verdict is not None and verdict.kind != "no eligibility rule" else "no rule"
    if care is None or care.state == NO_RECORD:
        water, water_key = "no record today", None
    else:
        minimum = "" if care.minimum_ml is None else f" of {care.minimum_ml:.2f}"
        running = " (session running)" if care.state == RUNNING else ""
        water, water_key = f"{care.total_ml:.2f}{minimum}{running}", care.total_ml
    if care is None or care.weight_g is None:
        weight, weight_key = "no weight", None
    else:
        percent = "" if care.percent_of_baseline is None else f" ({care.percent_of_baseline:.1f} %)"
        weight, weight_key = f"{care.weight_g:.1f}{percent}", care.percent_of_baseline or care.weight_g
    cells = (animal, stage or "not known", "none" if sessions is None else str(sessions), plateau, slow, state,
             water, weight)
    return CohortRow(cells, (animal, stage, sessions, plateau_key, slow_key, state, water_key, weight_key))


def thresholds_text(c: CareConfig) -> str:
    species = ", ".join(f"{name} {figure:g}" for name, figure in c.species_ml_per_100g)
    parts = [p for p in (
        f"{c.daily_minimum_ml:g} ml" if c.daily_minimum_ml is not None else "",
        f"{c.daily_minimum_ml_per_kg:g} ml per kg body weight" if c.daily_minimum_ml_per_kg is not None else "",
        f"ml per 100 g body weight ({species}, any other species {c.daily_minimum_ml_per_100g:g})"
        if c.daily_minimum_ml_per_100g is not None else "") if p]
    minimum = "per day " + (f"the larger of {' and '.join(parts)}" if len(parts) > 1 else "".join(parts))
    return (f"Minimum {minimum}, due by {c.end_of_day:%H:%M}; weight warning below {c.weight_warning_percent:g} % "
            f"and limit below {c.weight_limit_percent:g} % of baseline; alert after {c.no_fluid_hours:g} h without "
            "fluid (advisory thresholds)")


class DecisionsAndCare(QObject):
    """The window's eligibility and care side, wired to a Controller (GUI thread only)."""

    def __init__(self, controller, config: CareConfig | None = None, check_every_ms: int = CHECK_EVERY_MS) -> None:
        super().__init__(controller)
        self.controller = controller
        self.config = config or CareConfig()     # the lab's [care] thresholds (monitor.app.settings)
        self.draws: dict[str, Draw] = {}     # animal -> the draw its open dialog shows
        self.verdicts: dict[str, Verdict] = {}
        self.summaries: dict[str, DaySummary] = {}
        self.figures: dict[str, AnimalFigures] = {}    # animal -> the figures its verdict was judged on
        self.cohort: CohortTable | None = None
        self._raised: dict[str, dict[tuple, int]] = {}   # animal -> (day, kind, level) -> alert id
        self._busy = False
        self._again: set[str] | None = None     # animals to judge once the running job is done (empty: all)
        self.care_panel: CarePanel | None = None
        self.dialog: QWidget | None = None
        self.timer = QTimer(self)
        self.timer.setInterval(check_every_ms)
        self.timer.timeout.connect(lambda: self.update())

    # --- wiring ------------------------------------------------------------------------
    def attach(self, window) -> None:
        window.cohort_requested.connect(self.open_cohort)
        window.decision_requested.connect(self.open_decision)
        window.history_requested.connect(self.open_history)
        window.care_requested.connect(self.open_care)
        self.timer.start()
        QTimer.singleShot(0, lambda: self.update())     # the first check as soon as the window is up

    def texts(self, animal: str) -> tuple[str, str]:
        """(care line, eligibility line) for the animal's page; empty until known."""
        summary = self.summaries.get(animal)
        return (care_text(summary) if summary else "", eligibility_text(self.verdicts.get(animal)))

    def _window(self):
        return self.controller.window

    def _say(self, message: str) -> None:
        if self._window() is not None:
            self._window().statusBar().showMessage(message, 15000)

    def _operator(self) -> str:
        window = self._window()
        return window.alert_panel.operator.text().strip() if window is not None else ""

    def _read(self, fn: Callable[[Any], Any]) -> Callable[[Any], Any]:
        return read_job(Path(self.controller.writer.path), fn)

    def _show(self, dialog: QWidget) -> QWidget:
        dialog.setAttribute(Qt.WidgetAttribute.WA_DeleteOnClose)
        self.dialog = dialog
        dialog.show()
        return dialog

    # --- judging and care checks -----------------------------------------------------------
    def update(self, animals: Sequence[str] | None = None) -> None:
        """Judge `animals` (None: every animal in the store) and compute the care day, in a worker."""
        if self._busy:
            if animals is None:
                self._again = set()
            elif self._again != set():
                self._again = (self._again or set()) | set(animals)
            return
        self._busy = True
        day, now = date.today(), datetime.now().astimezone()
        panel_day = self.care_panel.view.day if self.care_panel is not None else None

        def read(conn) -> tuple:
            from monitor.store.registry import animal_names, find_animal

            known = [n for n in animal_names(conn) if n and find_animal(conn, n) is not None]
            names = known if animals is None else [n for n in animals if n in known]
            judged: dict[str, Judgement | str | None] = {}
            for name in names:
                try:
                    judged[name] = judge(conn, name)
                except RuleError as exc:
                    judged[name] = str(exc)
            panel = care_day(conn, known, panel_day, self.config, now) if panel_day is not None else None
            return judged, care_day(conn, names, day, self.config, now), panel

        self.controller.run_job("eligibility and care", self._read(read), self._judged, failed=self._over)

    def _over(self) -> None:
        self._busy = False
        again, self._again = self._again, None
        if again is not None:
            self.update(None if not again else sorted(again))

    def _judged(self, result: tuple) -> None:
        judged, summaries, panel = result
        for name, j in judged.items():
            if isinstance(j, str):
                self._say(f"{name}: {j}")
            elif j is not None:
                if j.rule is not None:
                    for change in window_changes(self.verdicts.get(name), j.verdict, j.rule.warn_sessions):
                        self._push(name, WINDOW_KIND[change.kind], WINDOW_SEVERITY[change.kind], change.message)
                self.verdicts[name] = j.verdict
                self.figures[name] = j.figures
        for s in summaries:
            self.summaries[s.animal] = s
            before = self._raised.get(s.animal, {})
            now: dict[tuple, int] = {}
            for a in s.alerts:
                if a.kind in STATE_KINDS:        # the day's state, shown on the page and the care window
                    continue
                key = (s.day, a.kind, a.level)
                now[key] = before[key] if key in before else self._push(
                    s.animal, a.kind.replace("_", " "), CARE_SEVERITY[a.level], f"{s.animal}: {a.message}")
            for key, alert_id in before.items():   # no longer true (weighed, supplement logged...): off the list
                if key not in now:
                    self.controller.alert_book.acknowledge(alert_id, CLEARED_BY)
            self._raised[s.animal] = now
        if self.cohort is not None:
            self.cohort.set_view(self.cohort_view())
        if panel is not None and self.care_panel is not None:
            self.care_panel.set_view(CareView(self.care_panel.view.day, tuple(care_row(s) for s in panel),
                                              thresholds_text(self.config)))
        for name in set(judged) | {s.animal for s in summaries}:
            self.controller.pages.push(name)
        self._over()

    def _push(self, animal: str, kind: str, severity: str, text: str) -> int:
        """An animal's alert: in the list under the animal, not on a box's tile (the box is not at fault)."""
        return self.controller.alerts.push(RaisedAlert("", animal, Raised(kind, severity, text), time.time())).id

    # --- decisions ---------------------------------------------------------------------------
    def open_decision(self, animal: str) -> None:
        """Read the animal's figures and verdict now, then open the dialog on exactly those."""
        if not animal:
            self._say("Open an animal's page first, then record a decision for it.")
            return
        from monitor.store.decisions import entries

        def read(conn) -> tuple:
            return judge(conn, animal), entries(conn, animal)

        def done(result: tuple) -> None:
            j, earlier = result
            if j is None:
                self._say(f"{animal} has no session with a protocol yet: nothing to decide on.")
                return
            self.draws.pop(animal, None)
            dialog = DecisionDialog(decision_view(j, earlier, self._operator()), self._window())
            dialog.decided.connect(lambda request: self.record(request, j))
            dialog.draw_requested.connect(lambda _: self.draw(dialog, j))
            self._show(dialog)

        self.controller.run_job(f"figures of {animal}", self._read(read), done)

    def draw(self, dialog: DecisionDialog, j: Judgement) -> None:
        """Draw the animal's group (the cohort's plan is recorded if new) and show it in the dialog."""
        animal = j.figures.animal

        def work(conn) -> Draw | str:
            try:
                return draw_next(conn, j)
            except AssignError as exc:
                return f"No draw: {exc}."

        def done(result: Draw | str) -> None:
            if isinstance(result, str):
                dialog.show_draw_refused(result)
                return
            self.draws[animal] = result
            dialog.show_draw(result.group, draw_text(result))

        self.controller.run_job(f"drawing a group for {animal}", lambda job: self.controller.writer.call(work), done)

    def record(self, request: DecisionRequest, j: Judgement) -> None:
        """Append the decision with the snapshot the dialog showed (through the store writer)."""
        draw = self.draws.pop(request.animal, None) if request.drawn else None

        def write(conn) -> LogEntry:
            if draw is not None:
                return record_draw(conn, j, draw, operator=request.operator, reason=request.reason,
                                   planned_manipulation=request.planned_manipulation,
                                   planned_date=request.planned_date)
            return record_decision(conn, j, decision=request.decision, operator=request.operator,
                                   reason=request.reason, group=request.group,
                                   planned_manipulation=request.planned_manipulation,
                                   planned_date=request.planned_date, corrects=request.corrects)

        def done(entry: LogEntry) -> None:
            d = entry.decision
            agree = ("no rule to compare with" if j.rule is None else
                     "differs from the rule (both recorded)" if d.disagrees_with_rule else "agrees with the rule")
            how = f", drawn at random ({d.assignment_method})" if draw is not None else ""
            self._say(f"Entry {entry.seq} recorded: {d.animal} {d.decision}{how}; rule: {d.rule_state}; {agree}.")

        self.controller.run_job(f"recording the decision for {request.animal}",
                                lambda job: self.controller.writer.call(write), done)

    def open_history(self, animal: str) -> None:
        if not animal:
            self._say("Open an animal's page first to see its decisions.")
            return
        from monitor.store.decisions import entries, verify

        self.controller.run_job(f"decisions of {animal}", self._read(lambda c: (entries(c, animal), verify(c))),
                                lambda r: self._show(DecisionHistory(history_view(animal, *r), self._window())))

    # --- care -------------------------------------------------------------------------------
    def cohort_view(self) -> CohortView:
        """Every animal judged or cared for, one row each."""
        stages = self.controller.roster().current_stage
        names = sorted(set(self.figures) | set(self.summaries))
        return CohortView(date.today(), tuple(cohort_row(n, stages.get(n), self.figures.get(n), self.verdicts.get(n),
                                                         self.summaries.get(n)) for n in names))

    def open_cohort(self) -> None:
        if self.cohort is not None:
            self.cohort.raise_()
            return
        table = CohortTable(self.cohort_view(), self._window())
        table.refresh_requested.connect(lambda: self.update())
        table.destroyed.connect(lambda: setattr(self, "cohort", None))
        self.cohort = table
        table.setAttribute(Qt.WidgetAttribute.WA_DeleteOnClose)
        table.show()
        self.update()

    def open_care(self) -> None:
        if self.care_panel is not None:
            self.care_panel.raise_()
            return
        view = CareView(date.today(), tuple(care_row(self.summaries[a]) for a in sorted(self.summaries)),
                        thresholds_text(self.config))
        panel = CarePanel(view, self._operator(), self._window())
        panel.entry_logged.connect(self.log_care)
        panel.day_changed.connect(lambda day: (panel.set_view(CareView(day, (), thresholds_text(self.config))),
                                               self.update()))
        panel.export_requested.connect(self.export)
        panel.destroyed.connect(lambda: setattr(self, "care_panel", None))
        self.care_panel = panel
        self._show(panel)
        self.update()

    def log_care(self, entry: CareEntry) -> None:
        """Store a weight, supplement, note or baseline now, then recompute the care day."""
        from monitor.store import care_log
        from monitor.store.registry import ensure_animal

        at = datetime.now().astimezone().isoformat(timespec="seconds")

        def write(conn) -> None:
            if entry.kind == "weight":
                care_log.add_weighing(conn, entry.animal, at=at, grams=entry.amount, by=entry.by)
            elif entry.kind == "supplement":
                care_log.add_supplement(conn, entry.animal, at=at, ml=entry.amount, by=entry.by)
            elif entry.kind == "note":
                care_log.add_note(conn, entry.animal, at=at, by=entry.by, text=entry.text)
            else:
                ensure_animal(conn, entry.animal, baseline_weight_g=entry.amount)

        def done(_: Any) -> None:
            self._say(f"{entry.animal}: {entry.kind} recorded by {entry.by} ({at}).")
            self.update()

        self.controller.run_job(f"{entry.kind} for {entry.animal}", lambda job: self.controller.writer.call(write),
                                done)

    def export(self, kind: str, path: str) -> None:
        """Save the care window's day as CSV (worker) or as a printable PNG."""
        panel = self.care_panel
        if panel is None:
            return
        if kind == "png":
            ok = sheet_image(panel.view).save(path, "PNG")
            self._say(f"Care sheet saved: {path}" if ok else f"Care sheet not saved: cannot write {path}")
            return
        day, now = panel.view.day, datetime.now().astimezone()

        def read(conn) -> None:
            from monitor.store.registry import animal_names, find_animal

            names = [n for n in animal_names(conn) if n and find_animal(conn, n) is not None]
            write_care_csv(Path(path), care_day(conn, names, day, self.config, now))

        self.controller.run_job("saving the care sheet", self._read(read),
                                lambda _: self._say(f"Care sheet saved: {path}"))
