"""The cohort effects window: each manipulation's effect against the stage at which it was made.

Rule: fed the plain document of `rigside effects` (built by the app). One
measure at a time, against the baseline or (acute tests) against the control
session: a point per manipulation at x = the slow-state fraction at
the last session before it (its interval as a horizontal bar) and y = the
effect (its 95 % interval as a vertical bar); groups by
colour and by label beside each point, tests as filled discs and controls as
open squares, so neither colour nor shape alone carries the meaning. The
tests' least-squares trend is drawn with its 95 % band, the controls' as a
dashed line; one table gives each group's mean effect, another each
manipulation (effect with its interval, the baseline sessions' range,
against its control session, recovery). Groups show as codes
until the cohort is unblinded, and the window says so. Manipulations without a
slow-state estimate are in the table, not on the plot. With several cohorts,
each has its own document (trend and table) to choose. Advisory wording.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import pyqtgraph as pg
from PySide6.QtCore import Qt
from PySide6.QtGui import QColor
from PySide6.QtWidgets import (
    QAbstractItemView,
    QComboBox,
    QHBoxLayout,
    QHeaderView,
    QTabWidget,
    QTableWidget,
    QTableWidgetItem,
    QVBoxLayout,
    QWidget,
)

from monitor.ui.dialogs import plain_label
from monitor.ui.theme import OKABE_ITO, plot_colours

MEASURE_NAMES = {"hit_rate": "hit rate", "interval_error": "interval error (median |ln(interval/target)|)",
                 "cv": "CV of intervals", "premature_rate": "premature rate",
                 "trials_per_minute": "trials per minute"}
GROUP_COLOURS = ("blue", "orange", "bluish_green", "reddish_purple", "vermillion", "sky_blue")
ROLE_SYMBOL = {"test": "o", "control": "s"}
ALL = "all cohorts"
TABLE_COLUMNS = ("group", "role", "animals", "mean effect", "95 % interval")
EACH_COLUMNS = ("entry", "animal", "group", "role", "kind", "what", "session", "baseline sessions",
                "effect [95 % interval]", "baseline sessions' range", "against its control session", "recovery")
CAPTION = ("Each point is one manipulation: x = model-based slow-state fraction at the last session before it "
           "(horizontal bar: its interval), y = effect against its baseline sessions (vertical bar: 95 % "
           "interval). Filled discs: tests; open squares: controls. Line and band: the tests' least-squares "
           "trend with its 95 % interval; dashed: the controls'. A behavioural effect says what changed in the "
           "behaviour, not where in the brain. Advisory: the approved animal-use protocol, the animal-care "
           "committee and the veterinarian decide.")


def _fmt(value: float | None, digits: int = 3) -> str:
    return "—" if value is None or not math.isfinite(value) else f"{value:+.{digits}f}"


def _with_interval(estimate: dict[str, Any] | None) -> str:
    if not estimate or estimate.get("effect") is None:
        return "—"
    if estimate.get("low") is None:
        return _fmt(estimate["effect"])
    return f"{_fmt(estimate['effect'])} [{_fmt(estimate['low'])}, {_fmt(estimate['high'])}]"


def _range(values: list[float] | None) -> str:
    return "" if not values else f"{values[0]:.3f} to {values[1]:.3f}"


def _recovery(effect: dict[str, Any]) -> str:
    r = effect.get("recovery")
    if not r:
        return ""
    if r["recovered"]:
        return f"back within the baseline at session {r['session']} ({r['sessions']} session(s))"
    return f"not recovered ({r['followed']} session(s) followed)"


def _table(columns: tuple[str, ...]) -> QTableWidget:
    table = QTableWidget(0, len(columns))
    table.setHorizontalHeaderLabels(columns)
    table.setEditTriggers(QAbstractItemView.EditTrigger.NoEditTriggers)
    table.horizontalHeader().setSectionResizeMode(QHeaderView.ResizeMode.ResizeToContents)
    return table


class EffectsView(QWidget):
    """The cohort plot, its trend and the table by group, for one measure at a time."""

    def __init__(self, document: dict[str, Any], parent: QWidget | None = None,
                 cohorts: dict[str, dict[str, Any]] | None = None) -> None:
        super().__init__(parent)
        self.setWindowTitle("Cohort effects")
        self.document = document
        self.documents = {ALL: document, **(cohorts or {})}
        self.cohort = QComboBox()
        self.cohort.addItems(list(self.documents))
        self.cohort.setVisible(len(self.documents) > 2)      # one cohort: the same as all
        self.cohort.currentTextChanged.connect(self._choose)
        self.measure = QComboBox()
        for key, name in MEASURE_NAMES.items():
            self.measure.addItem(name, key)
        self.measure.currentIndexChanged.connect(lambda _: self.redraw())
        self.against = QComboBox()
        self.against.addItem("against its baseline sessions", "vs_baseline")
        self.against.addItem("against its control session (acute tests)", "vs_control")
        self.against.currentIndexChanged.connect(lambda _: self.redraw())
        self.blinding = plain_label()
        self.note = plain_label()
        background, foreground = plot_colours()
        self.plot = pg.PlotWidget(background=background)
        self.plot.showGrid(x=True, y=True, alpha=0.2)
        self.plot.setLabel("bottom", "slow-state fraction at the last session before (model-based, 0–1)")
        self.plot.setXRange(0, 1, padding=0.02)
        self.plot.getAxis("left").enableAutoSIPrefix(False)
        self.legend = self.plot.addLegend(offset=(-10, -10))
        self.table = _table(TABLE_COLUMNS)
        self.each = _table(EACH_COLUMNS)
        self.tables = QTabWidget()
        self.tables.addTab(self.table, "By group")
        self.tables.addTab(self.each, "Each manipulation")
        self.tables.setMaximumHeight(200)
        top = QHBoxLayout()
        top.addWidget(self.cohort)
        top.addWidget(plain_label("Measure", wrap=False))
        top.addWidget(self.measure)
        top.addWidget(self.against)
        top.addWidget(self.blinding, 1)
        layout = QVBoxLayout(self)
        layout.addLayout(top)
        layout.addWidget(self.plot, 1)
        layout.addWidget(self.note)
        layout.addWidget(self.tables)
        layout.addWidget(plain_label(CAPTION))
        self.foreground = foreground
        self.items: list[Any] = []
        self.redraw()

    def _against(self) -> str:
        return self.against.currentData() or "vs_baseline"

    def _suffixed(self, key: str) -> str:
        return key + ("_vs_control" if self._against() == "vs_control" else "")

    def _choose(self, name: str) -> None:
        self.document = self.documents[name]
        self.redraw()

    def groups(self) -> list[str]:
        return sorted({str(r.get("group") or "no group") for r in self.document.get("manipulations", [])})

    def redraw(self) -> None:
        """Draw the chosen measure (the window is shown once a session; items are rebuilt here only)."""
        key = self.measure.currentData()
        for item in self.items:
            self.plot.removeItem(item)
        self.items = []
        self.legend.clear()
        rows = self.document.get("manipulations", [])
        coded = any(r.get("group_shown_as") == "code" for r in rows)
        self.blinding.setText("Groups are shown by their codes: the cohort is blinded." if coded else
                              "Group names shown (cohort unblinded or not blinded).")
        other = "control session" if self._against() == "vs_control" else "baseline"
        self.plot.setLabel("left", f"effect on {MEASURE_NAMES[key]} (manipulated − {other})")
        zero = pg.InfiniteLine(pos=0, angle=0, pen=pg.mkPen(self.foreground, width=1, style=Qt.PenStyle.DotLine))
        self._add(zero)
        colours = {g: QColor(OKABE_ITO[GROUP_COLOURS[i % len(GROUP_COLOURS)]]) for i, g in enumerate(self.groups())}
        unplotted = 0
        for (group, role), points in self._points(key).items():
            plotted = [p for p in points if math.isfinite(p["x"])]
            unplotted += len(points) - len(plotted)
            if not plotted:
                continue
            self._draw_group(group, role, plotted, colours[group])
        self._draw_trends(key)
        self.note.setText(f"{unplotted} manipulation(s) without a slow-state estimate: in the table, not on the plot."
                          if unplotted else "")
        self._fill_table(key)
        self._fill_each(key)

    def _add(self, item: Any) -> None:
        self.plot.addItem(item)
        self.items.append(item)

    def _points(self, key: str) -> dict[tuple[str, str], list[dict[str, Any]]]:
        out: dict[tuple[str, str], list[dict[str, Any]]] = {}
        for r in self.document.get("manipulations", []):
            est = ((r.get("effect") or {}).get(self._against()) or {}).get(key) or {}
            if est.get("effect") is None:
                continue
            stage = r.get("stage") or {}
            x = stage.get("slow_estimate")
            out.setdefault((str(r.get("group") or "no group"), r["role"]), []).append({
                "animal": r["animal"], "x": math.nan if x is None else x, "x_low": stage.get("slow_low"),
                "x_high": stage.get("slow_high"), "y": est["effect"], "y_low": est.get("low"),
                "y_high": est.get("high")})
        return out

    def _draw_group(self, group: str, role: str, points: list[dict[str, Any]], hue: QColor) -> None:
        x = np.array([p["x"] for p in points])
        y = np.array([p["y"] for p in points])

        def extent(key: str, centre: np.ndarray, below: bool) -> np.ndarray:
            values = np.array([np.nan if p[key] is None else p[key] for p in points], float)
            gap = centre - values if below else values - centre
            return np.where(np.isfinite(gap), np.maximum(gap, 0), 0)

        bars = pg.ErrorBarItem(x=x, y=y, left=extent("x_low", x, True), right=extent("x_high", x, False),
                               bottom=extent("y_low", y, True), top=extent("y_high", y, False),
                               pen=pg.mkPen(hue, width=1.5), beam=0.008)
        self._add(bars)
        filled = role == "test"
        scatter = pg.ScatterPlotItem(x=x, y=y, symbol=ROLE_SYMBOL.get(role, "t"), size=11,
                                     pen=pg.mkPen(hue, width=2), brush=pg.mkBrush(hue if filled else None))
        self._add(scatter)
        self.legend.addItem(scatter, f"{group} · {role}")
        for p in points:
            label = pg.TextItem(f"{p['animal']} · {group}", color=self.foreground, anchor=(0, 1))
            label.setPos(p["x"], p["y"])
            self._add(label)

    def _draw_trends(self, key: str) -> None:
        for role, style in (("test", Qt.PenStyle.SolidLine), ("control", Qt.PenStyle.DashLine)):
            fitted = (self.document.get(self._suffixed("trend"), {}).get(key) or {}).get(role)
            if not fitted:
                continue
            line = fitted["line"]
            pen = pg.mkPen(self.foreground, width=2, style=style)
            self._add(pg.PlotDataItem(line["x"], line["fit"], pen=pen))
            if role == "test":
                low = pg.PlotDataItem(line["x"], line["low"], pen=pg.mkPen(None))
                high = pg.PlotDataItem(line["x"], line["high"], pen=pg.mkPen(None))
                self._add(low)
                self._add(high)
                band = QColor(self.foreground)
                band.setAlpha(40)
                self._add(pg.FillBetweenItem(low, high, brush=pg.mkBrush(band)))

    def _fill_table(self, key: str) -> None:
        rows = self.document.get(self._suffixed("groups"), {}).get(key, [])
        trend = (self.document.get(self._suffixed("trend"), {}).get(key) or {}).get("test")
        self.table.setRowCount(len(rows) + (1 if trend else 0))
        for i, r in enumerate(rows):
            interval = "—" if r.get("low") is None else f"{_fmt(r['low'])} to {_fmt(r['high'])}"
            for j, text in enumerate((str(r.get("group") or "no group"), r["role"], str(r["n"]), _fmt(r["mean"]),
                                      interval)):
                self.table.setItem(i, j, QTableWidgetItem(text))
        if trend:
            cells = ("trend of the tests", "slope per unit fraction", str(trend["n"]), _fmt(trend["slope"]),
                     f"{_fmt(trend['slope_low'])} to {_fmt(trend['slope_high'])}")
            for j, text in enumerate(cells):
                self.table.setItem(len(rows), j, QTableWidgetItem(text))

    def _fill_each(self, key: str) -> None:
        rows = self.document.get("manipulations", [])
        self.each.setRowCount(len(rows))
        for i, r in enumerate(rows):
            effect = r.get("effect") or {}
            cells = (str(r.get("seq", "")), r["animal"], str(r.get("group") or "no group"), r["role"],
                     r.get("duration", ""), r.get("what", ""), str(r.get("session") or ""),
                     " ".join(map(str, effect.get("baseline_sessions", []))) or r.get("error", ""),
                     _with_interval((effect.get("vs_baseline") or {}).get(key)),
                     _range((effect.get("baseline_range") or {}).get(key)),
                     _with_interval((effect.get("vs_control") or {}).get(key)) if effect.get("vs_control") else "",
                     _recovery(effect))
            for j, text in enumerate(cells):
                self.each.setItem(i, j, QTableWidgetItem(text))
