"""One overview tile per rig, drawn with plain QPainter.

Rule: a tile repaints only when its state changes (`set_state` compares by
value), and painting is a handful of text and rectangle calls — no plot items —
so sixteen tiles stay cheap at the app's refresh rate: the parts that rarely
change are kept in a pixmap (`tile_paint.paint_static`) and only the figures a
trial changes are drawn over it (`tile_paint.paint_dynamic`). The figures that matter
(trials today, hit rate, state) are the largest; the connection state is a word,
a shape and a colour together. All text comes from `tile_texts`, a pure function
the tests read; names from devices or files are drawn as plain text (QPainter
never interprets markup). Click or Enter emits `open_requested(rig)`.
"""

from __future__ import annotations

import math
from typing import Hashable, NamedTuple

from PySide6.QtCore import QEvent, QSize, Qt, Signal
from PySide6.QtGui import QFocusEvent, QKeyEvent, QMouseEvent, QPainter, QPaintEvent, QPixmap
from PySide6.QtWidgets import QSizePolicy, QWidget

from monitor.ui.models import RigTileState
from monitor.ui.theme import plain_tooltip
from monitor.ui.tile_paint import TileLayout, histogram_bars, inks, layout_for, paint_dynamic, paint_static, static_key

DASH = "–"


def clock_text(seconds: float | None) -> str:
    """Session clock as h:mm:ss, or 'no session'."""
    if seconds is None or not math.isfinite(seconds) or seconds < 0:
        return "no session"
    whole = int(seconds)
    return f"{whole // 3600}:{whole % 3600 // 60:02d}:{whole % 60:02d}"


def percent(value: float | None) -> str:
    return DASH if value is None or not math.isfinite(value) else f"{100 * value:.0f} %"


def interval_text(low: float | None, high: float | None, label: str = "95 % CI") -> str:
    if low is None or high is None or not (math.isfinite(low) and math.isfinite(high)):
        return f"{label} {DASH}"
    return f"{label} {100 * low:.0f}–{100 * high:.0f} %"


def ms_text(value: float | None) -> str:
    return DASH if value is None or not math.isfinite(value) else f"{value:.0f} ms"


class TileTexts(NamedTuple):
    title: str
    animal: str
    state: str
    clock: str
    trials: str
    trials_caption: str
    hit_rate: str
    hit_interval: str
    last_interval: str
    window: str
    badge: str
    axis_low: str
    axis_high: str


def tile_texts(state: RigTileState) -> TileTexts:
    """Every string a tile shows for `state`."""
    edges = state.hist_edges_ms
    if state.window_low_ms is not None and state.window_high_ms is not None:
        window = f"window {state.window_low_ms:.0f}–{state.window_high_ms:.0f} ms"
    else:
        window = "no window"
    unattended = state.animal is None and state.unattended_presses > 0   # presses kept with nobody checked in
    return TileTexts(
        title=state.rig,
        animal=state.animal or "no animal",
        state=state.connection.word,
        clock="" if unattended else clock_text(state.session_seconds),
        trials=f"{state.unattended_presses if unattended else state.trials_today:d}",
        trials_caption="presses kept" if unattended else "trials today",
        hit_rate="hit " + percent(state.hit_rate),
        hit_interval=(interval_text(state.hit_low, state.hit_high, f"last {state.hit_window} · CI")   # 95 %
                      if state.hit_window else interval_text(state.hit_low, state.hit_high)),
        last_interval="last " + ms_text(state.last_interval_ms),
        window=window,
        badge=str(state.alert_count) if state.alert_count else "",
        axis_low=f"{edges[0]:.0f}" if edges else "",
        axis_high=f"{edges[-1]:.0f} ms" if edges else "",
    )


class RigTile(QWidget):
    """A compact, focusable summary of one rig."""

    open_requested = Signal(str)
    focused = Signal(str)

    def __init__(self, state: RigTileState, parent: QWidget | None = None) -> None:
        super().__init__(parent)
        self._state = state
        self._texts = tile_texts(state)
        self._bars = histogram_bars(state.hist_counts, state.hist_edges_ms)
        self._static: QPixmap | None = None
        self._static_for: Hashable = None
        self._layout_cache: TileLayout | None = None
        self._layout_for: Hashable = None
        self._inks = inks(self.palette())
        self.paint_count = 0
        self.static_builds = 0      # how often the static layer was drawn (it is kept between paints)
        self.setFocusPolicy(Qt.FocusPolicy.StrongFocus)
        self.setSizePolicy(QSizePolicy.Policy.Expanding, QSizePolicy.Policy.Expanding)
        self.setMinimumSize(220, 140)
        self.setCursor(Qt.CursorShape.PointingHandCursor)
        self._update_accessible()

    @property
    def state(self) -> RigTileState:
        return self._state

    @property
    def texts(self) -> TileTexts:
        return self._texts

    def set_state(self, state: RigTileState) -> None:
        """Show `state`; schedules a repaint only when something changed."""
        if state == self._state:
            return
        if state.hist_counts != self._state.hist_counts or state.hist_edges_ms != self._state.hist_edges_ms:
            self._bars = histogram_bars(state.hist_counts, state.hist_edges_ms)
        self._state = state
        self._texts = tile_texts(state)
        self._update_accessible()
        self.update()

    def sizeHint(self) -> QSize:
        return QSize(300, 180)

    def _update_accessible(self) -> None:
        t = self._texts
        self.setAccessibleName(f"{t.title} {t.animal}")
        self.setAccessibleDescription(f"{t.state}, {t.clock}, {t.trials} {t.trials_caption}, "
                                      f"{t.hit_rate}, {t.last_interval}")
        self.setToolTip(plain_tooltip(self._state.source_text or t.title))

    # --- input -----------------------------------------------------------------
    def mouseReleaseEvent(self, event: QMouseEvent) -> None:
        if event.button() == Qt.MouseButton.LeftButton and self.rect().contains(event.position().toPoint()):
            self.open_requested.emit(self._state.rig)
        super().mouseReleaseEvent(event)

    def focusInEvent(self, event: QFocusEvent) -> None:
        self.focused.emit(self._state.rig)
        super().focusInEvent(event)

    def keyPressEvent(self, event: QKeyEvent) -> None:
        if event.key() in (Qt.Key.Key_Return, Qt.Key.Key_Enter, Qt.Key.Key_Space):
            self.open_requested.emit(self._state.rig)
            return
        super().keyPressEvent(event)

    # --- painting --------------------------------------------------------------
    def _static_layer(self, layout: TileLayout) -> QPixmap:
        """The tile's static layer, redrawn only when its key (state part, size, focus, palette) changed."""
        key = (static_key(self._state, self._texts), layout.width, layout.height, self.hasFocus(),
               self.palette().cacheKey(), self.devicePixelRatioF())
        if self._static is None or key != self._static_for:
            ratio = self.devicePixelRatioF()
            pixmap = QPixmap(round(layout.width * ratio), round(layout.height * ratio))
            pixmap.setDevicePixelRatio(ratio)
            pixmap.fill(Qt.GlobalColor.transparent)
            p = QPainter(pixmap)
            paint_static(p, layout, self._state, self._texts, self.palette(), self.hasFocus())
            p.end()
            self._static, self._static_for = pixmap, key
            self.static_builds += 1
        return self._static

    def _layout(self) -> TileLayout:
        key = (self.width(), self.height(), bool(self._texts.badge), self.font().key())
        if self._layout_cache is None or key != self._layout_for:
            self._layout_cache, self._layout_for = layout_for(float(self.width()), float(self.height()), self.font(),
                                                              key[2]), key
            self._inks = inks(self.palette())
        return self._layout_cache

    def changeEvent(self, event: QEvent) -> None:
        if event.type() in (QEvent.Type.PaletteChange, QEvent.Type.FontChange):
            self._layout_cache = self._static = None      # fonts and colours are read again at the next paint
        super().changeEvent(event)

    def paintEvent(self, event: QPaintEvent) -> None:
        self.paint_count += 1
        layout = self._layout()
        p = QPainter(self)
        p.drawPixmap(0, 0, self._static_layer(layout))
        paint_dynamic(p, layout, self._state, self._texts, self._bars, self._inks)
        p.end()
