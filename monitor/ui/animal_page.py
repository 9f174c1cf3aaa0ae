"""The animal page: today live, the learning curve, consolidation, the session table.

Rule: the page subscribes to an AnimalBook for one animal and redraws a part
only when the app pushed a new object for it (the live part every trial, the
history parts at session end); plot items are made once and `setData`-ed.
Every axis names its unit, every estimate is drawn with its interval, every
verdict has its one-sentence reason beside it, and the consolidation figure
comes after the transparent measures with its caveat and the advisory note.
Flagging an exclusion or adding a condition emits a record; the app stores it.
Buttons beside the eligibility and care lines ask the app for the decision
dialog, the decision history and the care window. A read-only page (a copy
from the lab database) keeps only the decision history and says why.
"""

from __future__ import annotations

import math

import numpy as np
import pyqtgraph as pg
from PySide6.QtCore import Qt, Signal
from PySide6.QtGui import QCloseEvent, QFont
from PySide6.QtWidgets import (
    QAbstractItemView,
    QCheckBox,
    QFormLayout,
    QGridLayout,
    QHBoxLayout,
    QHeaderView,
    QLabel,
    QPushButton,
    QTableWidget,
    QTableWidgetItem,
    QTabWidget,
    QVBoxLayout,
    QWidget,
)

from monitor.core.eligibility.labels import LABELS
from monitor.ui.dialogs import ConditionDialog, ExclusionDialog, plain_label
from monitor.ui.models import AnimalPageState, ConsolidationState, CurveState, SessionRow, TodayState
from monitor.ui.owners import AnimalBook
from monitor.ui.plots import RangeKeeper, long_series, make_plot, nice_ceiling, translucent
from monitor.ui.theme import ADVISORY, colour, plot_colours
from monitor.ui.tile import DASH, clock_text, ms_text, percent


def _big(label: QLabel, points: float, bold: bool = True) -> QLabel:
    font = QFont(label.font())
    font.setPointSizeF(points)
    font.setBold(bold)
    label.setFont(font)
    return label


def _points(fraction: float) -> str:
    """A difference of proportions in whole percentage points (an int: never "-0")."""
    return str(int(round(100 * fraction))) if math.isfinite(fraction) else DASH


def _num(value: float | None, digits: int = 2) -> str:
    return DASH if value is None or not math.isfinite(value) else f"{value:.{digits}f}"


class Figure(QWidget):
    """A large number over a small caption."""

    def __init__(self, caption: str, parent: QWidget | None = None) -> None:
        super().__init__(parent)
        self.value = _big(plain_label(DASH, wrap=False), 20)
        self.caption = plain_label(caption, wrap=False)
        layout = QVBoxLayout(self)
        layout.setContentsMargins(4, 0, 12, 0)
        layout.setSpacing(0)
        layout.addWidget(self.value)
        layout.addWidget(self.caption)

    def set(self, text: str) -> None:
        self.value.setText(text)


LOG_TICKS_MS = (20, 50, 100, 200, 500, 1000, 2000, 5000, 10000)


def scaled_previous(today: np.ndarray, previous: np.ndarray | None) -> np.ndarray | None:
    """The previous session's histogram scaled to today's total, so the two compare by shape (None: nothing
    to compare: no previous session, or no trial today or then)."""
    if previous is None:
        return None
    before, now = float(np.sum(previous)), float(np.sum(today))
    if before <= 0 or now <= 0:
        return None
    return np.asarray(previous, float) * (now / before)


class HistogramPanel(QWidget):
    """Today's intervals against the window, the previous session's shape overlaid (scaled to today's total,
    its own counts on hover); linear or log bins."""

    def __init__(self, parent: QWidget | None = None) -> None:
        super().__init__(parent)
        self.plot = make_plot("interval (ms)", "trials (count)")
        self.log_bins = QCheckBox("log bins")
        self.log_bins.toggled.connect(self._redraw)
        self.region = pg.LinearRegionItem(values=(0, 1), movable=False, brush=translucent("bluish_green", 50),
                                          pen=pg.mkPen(colour("bluish_green"), width=1))
        self.target = pg.InfiniteLine(angle=90, movable=False, pen=pg.mkPen(colour("bluish_green"), width=2,
                                                                            style=Qt.PenStyle.DashLine))
        self.previous = pg.PlotDataItem(stepMode="center", pen=pg.mkPen(colour("orange"), width=2,
                                                                        style=Qt.PenStyle.DashLine),
                                        name="previous session (shape, scaled to today's total)")
        self.today = pg.PlotDataItem(stepMode="center", fillLevel=0, brush=translucent("blue", 110),
                                     pen=pg.mkPen(colour("blue"), width=2), name="today")
        self.plot.getPlotItem().addLegend(offset=(-10, 10), labelTextColor=plot_colours()[1])
        for item in (self.region, self.target, self.previous, self.today):
            self.plot.addItem(item)
        self.window_text = plain_label(wrap=False)
        self.hover = plain_label(wrap=False)
        self.hover.setObjectName("bin_counts")
        self.plot.scene().sigMouseMoved.connect(self._hovered)
        top = QHBoxLayout()
        top.addWidget(_big(plain_label("Intervals today", wrap=False), 12))
        top.addStretch(1)
        top.addWidget(self.window_text)
        top.addWidget(self.log_bins)
        layout = QVBoxLayout(self)
        layout.setContentsMargins(0, 0, 0, 0)
        layout.addLayout(top)
        layout.addWidget(self.plot, 1)
        layout.addWidget(self.hover)
        self._state: TodayState | None = None
        self._log_shown: bool | None = None   # the scale the axis shows (None: not drawn yet)
        self.ranges = RangeKeeper(self.plot)

    def set_state(self, state: TodayState) -> None:
        self._state = state
        self._redraw()

    def _redraw(self) -> None:
        state = self._state
        if state is None:
            return
        log = self.log_bins.isChecked()
        data = state.log if log else state.linear
        changed_scale = log != self._log_shown
        if changed_scale:   # relabelling an axis repaints it: only when the scale changes
            bottom = self.plot.getPlotItem().getAxis("bottom")
            bottom.setLabel("interval (ms, log scale)" if log else "interval (ms)")
            bottom.setTicks([[(math.log10(v), f"{v:g}") for v in LOG_TICKS_MS]] if log else None)
        self.today.setData(data.edges_ms, data.today)
        lo, hi = float(data.edges_ms[0]), float(data.edges_ms[-1])
        self.ranges.set_x(*((math.log10(lo), math.log10(hi)) if log else (lo, hi)))
        if changed_scale:
            self.plot.getPlotItem().setLogMode(x=log, y=False)   # after the range: no 10**1500 on the way
            self._log_shown = log
        shape = scaled_previous(data.today, data.previous)
        peak = max(float(np.max(data.today, initial=0)), float(np.max(shape, initial=0)) if shape is not None else 0.0)
        self.ranges.set_y(0.0, nice_ceiling(peak * 1.05))
        if shape is not None:
            self.previous.setData(data.edges_ms, shape)
        else:
            self.previous.setData([], [])
        to_axis = (lambda v: math.log10(v)) if log else (lambda v: v)
        if state.window_low_ms is not None and state.window_high_ms is not None and state.window_low_ms > 0:
            self.region.setRegion((to_axis(state.window_low_ms), to_axis(state.window_high_ms)))
            self.region.show()
            self.window_text.setText(f"window {state.window_low_ms:.0f}–{state.window_high_ms:.0f} ms")
        else:
            self.region.hide()
            self.window_text.setText("no window in force")
        if state.target_ms is not None and state.target_ms > 0:
            self.target.setValue(to_axis(state.target_ms))
            self.target.show()
        else:
            self.target.hide()


    def bin_text(self, interval_ms: float) -> str:
        """The counts of the bin holding `interval_ms`: today's and the previous session's own."""
        state = self._state
        if state is None:
            return ""
        data = state.log if self.log_bins.isChecked() else state.linear
        edges = np.asarray(data.edges_ms, float)
        k = int(np.searchsorted(edges, interval_ms, side="right")) - 1
        if not 0 <= k < len(data.today):
            return ""
        before = "" if data.previous is None else f", previous session {int(data.previous[k])}"
        return f"{edges[k]:.0f}–{edges[k + 1]:.0f} ms: today {int(data.today[k])}{before}"

    def _hovered(self, position) -> None:
        if not self.plot.sceneBoundingRect().contains(position):
            self.hover.setText("")
            return
        x = self.plot.getPlotItem().vb.mapSceneToView(position).x()
        self.hover.setText(self.bin_text(10 ** x if self.log_bins.isChecked() else x))


class RollingPanel(QWidget):
    """Rolling hit rate over today's trials with its interval band."""

    def __init__(self, parent: QWidget | None = None) -> None:
        super().__init__(parent)
        self.plot = make_plot("trial in session (trial number)", "hit rate (%)")
        self.ranges = RangeKeeper(self.plot)
        self.ranges.set_y(0, 100)
        self.low = long_series(pg.PlotDataItem(pen=pg.mkPen(None)))
        self.high = long_series(pg.PlotDataItem(pen=pg.mkPen(None)))
        self.band = pg.FillBetweenItem(self.low, self.high, brush=translucent("sky_blue", 90))
        self.rate = long_series(pg.PlotDataItem(pen=pg.mkPen(colour("blue"), width=2.5)))
        for item in (self.low, self.high, self.band, self.rate):
            self.plot.addItem(item)
        self.title = _big(plain_label("Rolling hit rate", wrap=False), 12)
        self.now = plain_label(wrap=False)
        top = QHBoxLayout()
        top.addWidget(self.title)
        top.addStretch(1)
        top.addWidget(self.now)
        layout = QVBoxLayout(self)
        layout.setContentsMargins(0, 0, 0, 0)
        layout.addLayout(top)
        layout.addWidget(self.plot, 1)

    def set_state(self, state: TodayState) -> None:
        x = np.asarray(state.trial_index, dtype=float)
        self.ranges.set_x(0.0, nice_ceiling(float(x[-1]) * 1.05) if len(x) else 1.0)
        self.rate.setData(x, 100 * np.asarray(state.rolling_rate, dtype=float))
        self.low.blockSignals(True)   # the band redraws its outline once, when the high edge follows
        self.low.setData(x, 100 * np.asarray(state.rolling_low, dtype=float))
        self.low.blockSignals(False)
        self.high.setData(x, 100 * np.asarray(state.rolling_high, dtype=float))
        level = f"{100 * state.interval_level:.0f} %"
        self.title.setText(f"Rolling hit rate, last {state.rolling_size} trials (band: {level} interval)")
        if len(x):
            self.now.setText(f"now {percent(float(state.rolling_rate[-1]))} "
                             f"({percent(float(state.rolling_low[-1]))}–{percent(float(state.rolling_high[-1]))})")
        else:
            self.now.setText("no trials yet")


STAGE_SYMBOLS = ("t", "s", "d", "o", "star", "p", "h", "+")     # one shape per stage, in the protocol's order
STAGE_COLOURS = ("orange", "sky_blue", "reddish_purple", "blue", "bluish_green", "vermillion", "yellow", "black")


class CurvePanel(QWidget):
    """The learning curve: every kept session of every stage, each stage its own shape and legend label,
    with intervals, the criterion and the plateau (judged in the final stage) marked."""

    def __init__(self, parent: QWidget | None = None) -> None:
        super().__init__(parent)
        self.plot = make_plot("session (the animal's own number)", "hit rate (%)")
        self.ranges = RangeKeeper(self.plot)
        self.ranges.set_y(0, 100)
        self.legend = self.plot.getPlotItem().addLegend(offset=(-10, -10), labelTextColor=plot_colours()[1])
        self.errors = pg.ErrorBarItem(x=np.empty(0), y=np.empty(0), pen=pg.mkPen(colour("sky_blue"), width=2))
        self.criterion = pg.InfiniteLine(angle=0, movable=False, label="criterion",
                                         labelOpts={"position": 0.05, "color": colour("vermillion")},
                                         pen=pg.mkPen(colour("vermillion"), width=1.5, style=Qt.PenStyle.DashLine))
        self.plateau = pg.InfiniteLine(angle=90, movable=False, label="plateau",
                                       labelOpts={"position": 0.92, "color": colour("bluish_green")},
                                       pen=pg.mkPen(colour("bluish_green"), width=2))
        for item in (self.errors, self.criterion, self.plateau):
            self.plot.addItem(item)
        self.stage_items: list[pg.PlotDataItem] = []     # one per stage, made once, reused
        self._legend_entries: list[str] = []
        self.stage_marks: list[pg.InfiniteLine] = []
        self.empty = plain_label("No session with trials yet: the curve fills in as sessions end.")
        layout = QVBoxLayout(self)
        layout.setContentsMargins(0, 0, 0, 0)
        layout.addWidget(_big(plain_label("Learning curve: every session of every stage, one shape per stage "
                                          "(excluded sessions left out)", wrap=True), 12))
        layout.addWidget(self.empty)
        layout.addWidget(self.plot, 1)

    def _stage_item(self, index: int) -> pg.PlotDataItem:
        while len(self.stage_items) <= index:
            k = len(self.stage_items) % len(STAGE_SYMBOLS)
            tint = colour(STAGE_COLOURS[k])
            item = pg.PlotDataItem(pen=pg.mkPen(tint, width=2), symbol=STAGE_SYMBOLS[k], symbolSize=9,
                                   symbolBrush=tint, symbolPen=pg.mkPen(plot_colours()[1], width=1))
            self.plot.addItem(item)
            self.stage_items.append(item)
        return self.stage_items[index]

    def _stage_mark(self, index: int) -> pg.InfiniteLine:
        while len(self.stage_marks) <= index:
            height = 0.97 - 0.07 * (len(self.stage_marks) % 3)     # stages one session apart stay legible
            line = pg.InfiniteLine(angle=90, movable=False, label="",
                                   labelOpts={"position": height, "color": colour("reddish_purple"),
                                              "anchors": [(0, 0), (0, 0)]},
                                   pen=pg.mkPen(colour("reddish_purple"), width=1.5, style=Qt.PenStyle.DotLine))
            self.plot.addItem(line)
            self.stage_marks.append(line)
        return self.stage_marks[index]

    def set_state(self, state: CurveState) -> None:
        x = np.asarray(state.session, dtype=float)
        y = 100 * np.asarray(state.measure, dtype=float)
        self.empty.setVisible(not len(x))
        if len(x):
            self.ranges.set_x(0.0, float(x.max()) + 0.5)
        self.errors.setData(x=x, y=y, top=100 * np.asarray(state.high) - y, bottom=y - 100 * np.asarray(state.low))
        self.plot.getPlotItem().getAxis("left").setLabel(f"{state.measure_name} (%)")
        names = list(dict.fromkeys(state.stage))
        stages = np.asarray(state.stage, dtype=object)
        entries = [f"stage {name}" + (" (plateau judged here)" if name == state.final_stage and len(names) > 1
                                      else "") for name in names]
        if entries != self._legend_entries:        # the legend is rebuilt only when the stages change
            self.legend.clear()
            for i, entry in enumerate(entries):
                self.legend.addItem(self._stage_item(i), entry)
            self._legend_entries = entries
        for i, name in enumerate(names):
            item, mine = self._stage_item(i), stages == name
            item.setData(x[mine], y[mine])
            item.show()
        for item in self.stage_items[len(names):]:
            item.setData([], [])
            item.hide()
        if state.criterion is not None:
            self.criterion.setValue(100 * state.criterion)
            self.criterion.label.setFormat(f"criterion {100 * state.criterion:.0f} %")
            self.criterion.show()
        else:
            self.criterion.hide()
        if state.plateau_session is not None:
            self.plateau.setValue(state.plateau_session)
            self.plateau.label.setFormat(f"plateau (session {state.plateau_session})")
            self.plateau.show()
        else:
            self.plateau.hide()
        firsts = sorted((float(x[stages == name].min()), name) for name in names)
        changes = [(where - 0.5, name) for where, name in firsts]
        for i, (where, name) in enumerate(changes):
            mark = self._stage_mark(i)
            mark.setValue(where)
            mark.label.setFormat(name)
            mark.show()
        for mark in self.stage_marks[len(changes):]:
            mark.hide()


class ConsolidationPanel(QWidget):
    """Transparent measures first; then the model's slow-state fraction with its interval and caveat."""

    def __init__(self, parent: QWidget | None = None) -> None:
        super().__init__(parent)
        self.measures: dict[str, QLabel] = {}
        form = QFormLayout()
        for key, caption in (("trials", LABELS["trials_since_plateau"]),
                             ("sessions", LABELS["sessions_since_plateau"]),
                             ("error", LABELS["interval_error"]), ("cv", LABELS["cv"]),
                             ("drops", "Start-of-session drop\n(hit-rate points, 95 % interval)")):
            label = _big(plain_label(), 12 if key != "drops" else 11, bold=key != "drops")
            self.measures[key] = label
            form.addRow(plain_label(caption, wrap=True), label)
        self.plot = make_plot("session (the animal's own number)", "slow-state fraction (0–1)")
        self.ranges = RangeKeeper(self.plot)
        self.ranges.set_y(0, 1)
        self.low = pg.PlotDataItem(pen=pg.mkPen(None))
        self.high = pg.PlotDataItem(pen=pg.mkPen(None))
        self.band = pg.FillBetweenItem(self.low, self.high, brush=translucent("reddish_purple", 70))
        self.fraction = pg.PlotDataItem(pen=pg.mkPen(colour("reddish_purple"), width=2.5))
        self.marks = pg.ScatterPlotItem(size=9)
        for item in (self.low, self.high, self.band, self.fraction, self.marks):
            self.plot.addItem(item)
        self.measures_of = plain_label()
        self.measures_of.setObjectName("measures_of")
        self.estimate = _big(plain_label(), 12)
        self.live = plain_label()
        self.live.setObjectName("live_fraction")
        self.comparison = plain_label()
        self.forecast = plain_label()
        self.caveat = plain_label()
        self.caveat.setObjectName("caveat")
        self.advisory = plain_label(ADVISORY)
        self.advisory.setObjectName("advisory")
        for label in (self.caveat, self.advisory):
            font = label.font()
            font.setItalic(True)
            label.setFont(font)
        left = QVBoxLayout()
        left.addWidget(_big(plain_label("Measured (no model)", wrap=False), 12))
        left.addLayout(form)
        self.warmup_note = plain_label()
        left.addWidget(self.warmup_note)
        left.addWidget(self.measures_of)
        left.addStretch(1)
        right = QVBoxLayout()
        right.addWidget(_big(plain_label("Model: slow-state fraction", wrap=False), 12))
        right.addWidget(plain_label("band: 90 % interval · ● estimated (no point where the data do not support one)"))
        right.addWidget(self.plot, 1)
        right.addWidget(self.estimate)
        right.addWidget(self.live)
        right.addWidget(self.comparison)
        right.addWidget(self.forecast)
        right.addWidget(self.caveat)
        right.addWidget(self.advisory)
        layout = QHBoxLayout(self)
        layout.setContentsMargins(0, 0, 0, 0)
        layout.addLayout(left, 5)
        layout.addLayout(right, 6)

    def set_state(self, state: ConsolidationState) -> None:
        m = self.measures
        m["trials"].setText(DASH if state.trials_since_plateau is None else f"{state.trials_since_plateau:,}")
        m["sessions"].setText(DASH if state.sessions_since_plateau is None else str(state.sessions_since_plateau))
        m["error"].setText(_num(state.interval_error, 3))
        m["cv"].setText(_num(state.cv, 3))
        self.measures_of.setText("" if state.measures_session is None else
                                 f"Interval error and CV of session {state.measures_session}, the same figures "
                                 "the eligibility rule judges.")
        drops = state.start_drops[-4:]
        m["drops"].setText("\n".join(f"session {d.session}: {_points(d.drop)} ({_points(d.low)} to {_points(d.high)})"
                                     for d in drops) or DASH)
        warmups = sorted({d.warmup_trials for d in drops})
        self.warmup_note.setText("Drops leave out each session's first "
                                 f"{'/'.join(map(str, warmups))} trials (warm-up)." if warmups else "")
        x = np.asarray(state.session, dtype=float)
        y = np.asarray(state.fraction, dtype=float)
        if len(x):
            self.ranges.set_x(float(x.min()) - 0.5, float(x.max()) + 0.5)
        estimated = np.array([s == "estimated" for s in state.status], bool)
        shown = np.where(estimated, y, np.nan) if len(estimated) == len(y) else y  # a point only when estimated
        self.fraction.setData(x, shown, connect="finite")
        self.low.setData(x, np.asarray(state.fraction_low, dtype=float))
        self.high.setData(x, np.asarray(state.fraction_high, dtype=float))
        keep = estimated if len(estimated) == len(x) else np.ones(len(x), bool)
        self.marks.setData(x=x[keep], y=y[keep], symbol="o", brush=colour("reddish_purple"),
                           pen=pg.mkPen(colour("reddish_purple"), width=2))
        if len(x) and state.estimate_text:
            self.estimate.setText(f"Session {x[-1]:.0f}: {state.estimate_text}")
        elif len(x):
            self.estimate.setText(
                f"Session {x[-1]:.0f}: {y[-1]:.2f} (90 % interval {state.fraction_low[-1]:.2f}–"
                f"{state.fraction_high[-1]:.2f}), {state.status[-1]}")
        else:
            self.estimate.setText("No fit yet: the model needs sessions after the plateau.")
        self.live.setText(state.live_text)
        self.live.setVisible(bool(state.live_text))
        self.comparison.setText(state.model_comparison)
        if state.forecast_text:
            self.forecast.setText(f"Forecast: {state.forecast_text}.")
        elif state.forecast_low is not None and state.forecast_high is not None:
            self.forecast.setText(f"Forecast: {state.forecast_level:.2f} in {state.forecast_low}–{state.forecast_high} "
                                  "more sessions (model range).")
        else:
            self.forecast.setText("Forecast: not constrained by the data yet.")
        self.caveat.setText(state.caveat)


SESSION_COLUMNS = ("#", "start", "box", "stage", "trials", "hits", "hit rate", "median (ms)", "CV",
                   "excluded", "reason", "conditions")


def session_cells(row: SessionRow) -> tuple[str, ...]:
    """The table's text for one session, in SESSION_COLUMNS order."""
    return (str(row.index), row.start, row.rig, row.stage, str(row.trials), str(row.hits), percent(row.hit_rate),
            ms_text(row.median_ms).replace(" ms", ""), _num(row.cv, 3), "excluded" if row.excluded else "",
            row.exclusion_reason, row.conditions)


class SessionTable(QWidget):
    """The animal's sessions with exclusion and condition columns and the actions on them."""

    exclusion_requested = Signal(object)   # Exclusion
    condition_requested = Signal(object)   # ConditionRecord

    def __init__(self, parent: QWidget | None = None) -> None:
        super().__init__(parent)
        self.animal = ""
        self.table = QTableWidget(0, len(SESSION_COLUMNS))
        self.table.setHorizontalHeaderLabels(list(SESSION_COLUMNS))
        self.table.setEditTriggers(QAbstractItemView.EditTrigger.NoEditTriggers)
        self.table.setSelectionBehavior(QAbstractItemView.SelectionBehavior.SelectRows)
        self.table.setSelectionMode(QAbstractItemView.SelectionMode.SingleSelection)
        self.table.verticalHeader().hide()
        header = self.table.horizontalHeader()
        header.setSectionResizeMode(QHeaderView.ResizeMode.ResizeToContents)
        header.setStretchLastSection(True)
        self.exclude_button = QPushButton("Flag exclusion…")
        self.include_button = QPushButton("Undo exclusion…")
        self.include_button.setToolTip("Count the selected excluded session again (a reason is asked and logged)")
        self.include_button.setEnabled(False)
        self.condition_button = QPushButton("Add condition…")
        self.exclude_button.clicked.connect(lambda: self.open_exclusion())
        self.include_button.clicked.connect(lambda: self.open_exclusion(undo=True))
        self.condition_button.clicked.connect(lambda: self.open_condition())
        self.table.itemSelectionChanged.connect(self._selection_changed)
        buttons = QHBoxLayout()
        buttons.addWidget(self.exclude_button)
        buttons.addWidget(self.include_button)
        buttons.addWidget(self.condition_button)
        buttons.addStretch(1)
        layout = QVBoxLayout(self)
        layout.setContentsMargins(0, 0, 0, 0)
        layout.addLayout(buttons)
        layout.addWidget(self.table, 1)
        self._rows: tuple[SessionRow, ...] = ()
        self.dialog: ExclusionDialog | ConditionDialog | None = None

    def set_rows(self, animal: str, rows: tuple[SessionRow, ...]) -> None:
        self.animal = animal
        if rows == self._rows:
            return
        self._rows = rows
        self.table.setRowCount(len(rows))
        for r, row in enumerate(rows):
            for c, text in enumerate(session_cells(row)):
                item = self.table.item(r, c)
                if item is None:
                    item = QTableWidgetItem()
                    self.table.setItem(r, c, item)
                item.setText(text)
                if c in (0, 4, 5, 6, 7, 8):
                    item.setTextAlignment(Qt.AlignmentFlag.AlignRight | Qt.AlignmentFlag.AlignVCenter)
        self.table.scrollToBottom()
        self._selection_changed()

    def selected_session(self) -> int | None:
        rows = self.table.selectionModel().selectedRows()
        if not rows:
            return None
        return self._rows[rows[0].row()].index

    def select_session(self, index: int) -> None:
        for r, row in enumerate(self._rows):
            if row.index == index:
                self.table.selectRow(r)

    def _selection_changed(self) -> None:
        session = self.selected_session()
        row = next((r for r in self._rows if r.index == session), None)
        self.include_button.setEnabled(row is not None and row.excluded)
        self.exclude_button.setEnabled(row is None or not row.excluded)

    def open_exclusion(self, session: int | None = None, undo: bool = False) -> ExclusionDialog | None:
        """Open the exclusion dialog for `session` (default: the selected row); `undo`: count it again."""
        session = session if session is not None else self.selected_session()
        if session is None:
            return None
        dialog = ExclusionDialog(self.animal, session, self, undo=undo)
        dialog.submitted.connect(self.exclusion_requested)
        return self._show(dialog)

    def open_condition(self, session: int | None = None) -> ConditionDialog | None:
        session = session if session is not None else self.selected_session()
        if session is None:
            return None
        dialog = ConditionDialog(self.animal, session, self)
        dialog.submitted.connect(self.condition_requested)
        return self._show(dialog)

    def _show(self, dialog):
        dialog.setAttribute(Qt.WidgetAttribute.WA_DeleteOnClose)
        self.dialog = dialog
        dialog.open()
        return dialog


class AnimalPage(QWidget):
    """One animal's page, kept in step with an AnimalBook."""

    exclusion_requested = Signal(object)   # Exclusion
    condition_requested = Signal(object)   # ConditionRecord
    decision_requested = Signal(str)       # animal
    history_requested = Signal(str)        # animal
    care_requested = Signal()
    manipulation_requested = Signal(str)   # animal

    def __init__(self, book: AnimalBook, animal: str, parent: QWidget | None = None) -> None:
        super().__init__(parent)
        self.book, self.animal = book, animal
        self.redraws = {"today": 0, "curve": 0, "consolidation": 0}
        self.title = _big(plain_label(animal, wrap=False), 20)
        self.where = _big(plain_label(wrap=False), 12, bold=False)
        self.clock = _big(plain_label(wrap=False), 16)
        self.figures = {key: Figure(caption) for key, caption in
                        (("trials", "trials"), ("hits", "hits"), ("premature", "premature"),
                         ("lone", "lone presses"), ("omission", "omissions"))}
        self.plateau_line = _big(plain_label(), 11)
        self.eligibility_line = _big(plain_label(), 11)
        self.care = plain_label()
        self.care_advisory = plain_label(ADVISORY)
        self.histogram = HistogramPanel()
        self.rolling = RollingPanel()
        self.curve = CurvePanel()
        self.consolidation = ConsolidationPanel()
        self.sessions = SessionTable()
        self.sessions.exclusion_requested.connect(self.exclusion_requested)
        self.sessions.condition_requested.connect(self.condition_requested)

        header = QGridLayout()
        header.addWidget(self.title, 0, 0)
        header.addWidget(self.where, 0, 1)
        header.addWidget(self.clock, 0, 2, Qt.AlignmentFlag.AlignRight)
        header.setColumnStretch(1, 1)
        figures = QHBoxLayout()
        for figure in self.figures.values():
            figures.addWidget(figure)
        figures.addStretch(1)
        today = QWidget()
        today_layout = QVBoxLayout(today)
        today_layout.addLayout(figures)
        plots = QHBoxLayout()
        plots.addWidget(self.histogram, 1)
        plots.addWidget(self.rolling, 1)
        today_layout.addLayout(plots, 1)
        self.sections = QTabWidget()
        self.sections.addTab(today, "Today")
        self.sections.addTab(self.curve, "Learning curve")
        self.sections.addTab(self.consolidation, "Consolidation")
        self.sections.addTab(self.sessions, "Sessions")
        self.record_buttons = {key: QPushButton(text) for key, text in (
            ("decide", "Record a decision…"), ("decisions", "Decision history…"), ("care", "Care today…"),
            ("manipulation", "Record a manipulation…"))}
        self.record_buttons["decide"].clicked.connect(lambda: self.decision_requested.emit(self.animal))
        self.record_buttons["decisions"].clicked.connect(lambda: self.history_requested.emit(self.animal))
        self.record_buttons["care"].clicked.connect(self.care_requested.emit)
        self.record_buttons["manipulation"].clicked.connect(lambda: self.manipulation_requested.emit(self.animal))
        eligibility = QHBoxLayout()
        eligibility.addWidget(self.eligibility_line, 1)
        eligibility.addWidget(self.record_buttons["decide"])
        eligibility.addWidget(self.record_buttons["decisions"])
        eligibility.addWidget(self.record_buttons["manipulation"])
        care = QHBoxLayout()
        care.addWidget(self.care, 1)
        care.addWidget(self.record_buttons["care"])
        self.read_only_note = plain_label()
        self.read_only_note.setObjectName("read_only_note")
        self.read_only_note.hide()
        layout = QVBoxLayout(self)
        layout.addLayout(header)
        layout.addWidget(self.read_only_note)
        layout.addWidget(self.plateau_line)
        layout.addLayout(eligibility)
        layout.addWidget(self.sections, 1)
        layout.addLayout(care)
        layout.addWidget(self.care_advisory)

        self._shown: AnimalPageState | None = None
        book.animal_changed.connect(self._on_changed)
        self._connected = True
        state = book.state(animal)
        if state is not None:
            self.show_state(state)

    def _on_changed(self, animal: str) -> None:
        if animal == self.animal:
            state = self.book.state(animal)
            if state is not None:
                self.show_state(state)

    def show_state(self, state: AnimalPageState) -> None:
        """Draw the parts of `state` that are new objects since the last call."""
        old = self._shown
        self._shown = state
        self.where.setText(f"{state.rig or 'not in a box'} · {state.protocol}")
        if state.today is not None and (old is None or old.today is not state.today):
            self._show_today(state.today)
        if state.curve is not None and (old is None or old.curve is not state.curve):
            self.redraws["curve"] += 1
            self.curve.set_state(state.curve)
            reason = state.curve.plateau_reason
            self.plateau_line.setText(f"Plateau: {state.curve.plateau_word}. {reason[:1].upper()}{reason[1:]}")
        if state.consolidation is not None and (old is None or old.consolidation is not state.consolidation):
            self.redraws["consolidation"] += 1
            self.consolidation.set_state(state.consolidation)
        self.sessions.set_rows(state.animal, state.sessions)
        self.care.setText(state.care_text)
        self.care.setVisible(bool(state.care_text))
        self.eligibility_line.setText(f"Eligibility (rule's verdict): {state.eligibility_text}")
        self.eligibility_line.setVisible(bool(state.eligibility_text))
        self.care_advisory.setVisible(bool(state.care_text or state.eligibility_text))

    def _show_today(self, today: TodayState) -> None:
        self.redraws["today"] += 1
        self.clock.setText(clock_text(today.session_seconds))
        for key in self.figures:
            self.figures[key].set(f"{getattr(today, key):d}")
        self.histogram.set_state(today)
        self.rolling.set_state(today)

    def make_read_only(self, note: str) -> None:
        """A page that records nothing (a copy read from elsewhere): only the decision history stays, and
        `note` says why."""
        for button in (*(self.record_buttons[k] for k in ("decide", "care", "manipulation")),
                       self.sessions.exclude_button, self.sessions.include_button, self.sessions.condition_button):
            button.hide()
        self.read_only_note.setText(note)
        self.read_only_note.show()

    def disconnect_book(self) -> None:
        if self._connected:
            self.book.animal_changed.disconnect(self._on_changed)
            self._connected = False

    def closeEvent(self, event: QCloseEvent) -> None:
        self.disconnect_book()
        super().closeEvent(event)
