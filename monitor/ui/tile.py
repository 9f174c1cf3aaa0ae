"""One overview tile per rig, drawn with plain QPainter.

Rule: a tile repaints only when its state changes (`set_state` compares by
value), and painting is a handful of text and rectangle calls — no plot items —
so sixteen tiles stay cheap at the app's refresh rate. The figures that matter
(trials today, hit rate, state) are the largest; the connection state is a word,
a shape and a colour together. All text comes from `tile_texts`, a pure function
the tests read; names from devices or files are drawn as plain text (QPainter
never interprets markup). Click or Enter emits `open_requested(rig)`.
"""

from __future__ import annotations

import math
from typing import NamedTuple

from PySide6.QtCore import QPointF, QRectF, QSize, Qt, Signal
from PySide6.QtGui import QColor, QFocusEvent, QFont, QKeyEvent, QMouseEvent, QPainter, QPaintEvent, QPalette, QPen
from PySide6.QtWidgets import QSizePolicy, QWidget

from monitor.ui.models import RigTileState
from monitor.ui.theme import SEVERITY_COLOUR, colour, draw_shape, plain_tooltip

DASH = "–"


def clock_text(seconds: float | None) -> str:
    """Session clock as h:mm:ss, or 'no session'."""
    if seconds is None or not math.isfinite(seconds) or seconds < 0:
        return "no session"
    whole = int(seconds)
    return f"{whole // 3600}:{whole % 3600 // 60:02d}:{whole % 60:02d}"


def percent(value: float | None) -> str:
    return DASH if value is None or not math.isfinite(value) else f"{100 * value:.0f} %"


def interval_text(low: float | None, high: float | None) -> str:
    if low is None or high is None or not (math.isfinite(low) and math.isfinite(high)):
        return "95 % CI " + DASH
    return f"95 % CI {100 * low:.0f}–{100 * high:.0f} %"


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
    return TileTexts(
        title=state.rig,
        animal=state.animal or "no animal",
        state=state.connection.word,
        clock=clock_text(state.session_seconds),
        trials=f"{state.trials_today:d}",
        trials_caption="trials today",
        hit_rate="hit " + percent(state.hit_rate),
        hit_interval=interval_text(state.hit_low, state.hit_high),
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
        self.paint_count = 0
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
    def _font(self, pixels: float, bold: bool = False) -> QFont:
        font = QFont(self.font())
        font.setPixelSize(max(9, int(pixels)))
        font.setBold(bold)
        return font

    def paintEvent(self, event: QPaintEvent) -> None:
        self.paint_count += 1
        s, t = self._state, self._texts
        pal = self.palette()
        text = pal.color(QPalette.ColorRole.WindowText)
        muted = pal.color(QPalette.ColorRole.PlaceholderText)
        w, h = float(self.width()), float(self.height())
        unit = min(h / 9.0, w / 14.0)   # one "line" of the tile
        pad = unit * 0.45
        p = QPainter(self)
        p.setRenderHint(QPainter.RenderHint.Antialiasing, True)
        frame = colour(s.connection.colour) if s.connection.word != "live" else pal.color(QPalette.ColorRole.Mid)
        p.setPen(QPen(pal.color(QPalette.ColorRole.Highlight) if self.hasFocus() else frame,
                      3.0 if self.hasFocus() else 1.5))
        p.setBrush(pal.color(QPalette.ColorRole.Base))
        p.drawRoundedRect(QRectF(1.5, 1.5, w - 3, h - 3), 6, 6)

        # header: rig and animal, alert badge at the right
        p.setPen(text)
        p.setFont(self._font(unit * 0.95, bold=True))
        badge_w = unit * 1.6 if t.badge else 0.0
        header = QRectF(pad, pad * 0.6, w - 2 * pad - badge_w, unit * 1.2)
        rig_w = p.fontMetrics().horizontalAdvance(t.title + "  ")
        p.drawText(header, Qt.AlignmentFlag.AlignLeft | Qt.AlignmentFlag.AlignVCenter, t.title)
        p.setFont(self._font(unit * 0.95))
        p.drawText(header.adjusted(rig_w, 0, 0, 0), Qt.AlignmentFlag.AlignLeft | Qt.AlignmentFlag.AlignVCenter,
                   p.fontMetrics().elidedText(t.animal, Qt.TextElideMode.ElideRight, int(header.width() - rig_w)))
        if t.badge and s.alert_severity is not None:
            self._paint_badge(p, QRectF(w - pad - badge_w, pad * 0.6, badge_w, unit * 1.2), t.badge,
                              colour(SEVERITY_COLOUR[s.alert_severity.word]), s.alert_severity.shape)

        # state line: shape + word, session clock at the right
        y = pad * 0.6 + unit * 1.3
        draw_shape(p, s.connection.shape, QPointF(pad + unit * 0.4, y + unit * 0.5), unit * 0.75,
                   colour(s.connection.colour))
        p.setPen(text)
        p.setFont(self._font(unit * 0.8, bold=True))
        line = QRectF(pad + unit, y, w - 2 * pad - unit, unit)
        p.drawText(line, Qt.AlignmentFlag.AlignLeft | Qt.AlignmentFlag.AlignVCenter, t.state)
        p.setFont(self._font(unit * 0.8))
        p.drawText(line, Qt.AlignmentFlag.AlignRight | Qt.AlignmentFlag.AlignVCenter, t.clock)

        # big numerals: trials today; right column: hit rate, its interval, last interval
        y += unit * 1.1
        left_w = w * 0.46
        p.setFont(self._font(unit * 2.4, bold=True))
        p.drawText(QRectF(pad, y, left_w, unit * 2.5), Qt.AlignmentFlag.AlignLeft | Qt.AlignmentFlag.AlignVCenter,
                   t.trials)
        p.setPen(muted)
        p.setFont(self._font(unit * 0.7))
        p.drawText(QRectF(pad, y + unit * 2.4, left_w, unit * 0.8), Qt.AlignmentFlag.AlignLeft, t.trials_caption)
        right = QRectF(pad + left_w, y, w - 2 * pad - left_w, unit)
        p.setPen(text)
        p.setFont(self._font(unit * 1.05, bold=True))
        p.drawText(right.adjusted(0, 0, 0, unit * 0.2), Qt.AlignmentFlag.AlignRight | Qt.AlignmentFlag.AlignVCenter,
                   t.hit_rate)
        p.setFont(self._font(unit * 0.7))
        p.setPen(muted)
        p.drawText(right.translated(0, unit * 1.15), Qt.AlignmentFlag.AlignRight | Qt.AlignmentFlag.AlignVCenter,
                   t.hit_interval)
        p.setPen(text)
        p.setFont(self._font(unit * 0.8))
        p.drawText(right.translated(0, unit * 2.1), Qt.AlignmentFlag.AlignRight | Qt.AlignmentFlag.AlignVCenter,
                   t.last_interval)

        # histogram against the window in force
        top = y + unit * 3.3
        self._paint_histogram(p, QRectF(pad, top, w - 2 * pad, h - top - pad * 0.5), unit, text, muted)
        p.end()

    def _paint_badge(self, p: QPainter, rect: QRectF, label: str, fill: QColor, shape: str) -> None:
        p.save()
        p.setPen(Qt.PenStyle.NoPen)
        p.setBrush(fill)
        p.drawRoundedRect(rect, rect.height() / 2, rect.height() / 2)
        draw_shape(p, shape, QPointF(rect.left() + rect.height() * 0.45, rect.center().y()), rect.height() * 0.5,
                   QColor("#000000"))
        p.setPen(QColor("#000000"))
        p.setFont(self._font(rect.height() * 0.75, bold=True))
        p.drawText(rect.adjusted(rect.height() * 0.7, 0, 0, 0), Qt.AlignmentFlag.AlignCenter, label)
        p.restore()

    def _paint_histogram(self, p: QPainter, area: QRectF, unit: float, text: QColor, muted: QColor) -> None:
        s, t = self._state, self._texts
        label_h = unit * 0.75
        plot = QRectF(area.left(), area.top(), area.width(), area.height() - label_h)
        if plot.height() < 8:
            return
        p.setFont(self._font(unit * 0.65))
        if not s.hist_counts:
            p.setPen(muted)
            p.drawText(plot, Qt.AlignmentFlag.AlignCenter, "no intervals yet")
            return
        lo, hi = s.hist_edges_ms[0], s.hist_edges_ms[-1]
        span = hi - lo or 1.0

        def x_of(ms: float) -> float:
            return plot.left() + (min(max(ms, lo), hi) - lo) / span * plot.width()

        if s.window_low_ms is not None and s.window_high_ms is not None:
            shade = colour("bluish_green")
            shade.setAlpha(60)
            p.fillRect(QRectF(x_of(s.window_low_ms), plot.top(), x_of(s.window_high_ms) - x_of(s.window_low_ms),
                              plot.height()), shade)
        peak = max(s.hist_counts) or 1
        bars = colour("blue")
        for count, left, right in zip(s.hist_counts, s.hist_edges_ms[:-1], s.hist_edges_ms[1:]):
            if count:
                bar_h = count / peak * plot.height()
                p.fillRect(QRectF(x_of(left), plot.bottom() - bar_h, max(1.0, x_of(right) - x_of(left) - 1), bar_h),
                           bars)
        if s.last_interval_ms is not None and math.isfinite(s.last_interval_ms):
            p.setPen(QPen(colour("orange"), 2.5))
            x = x_of(s.last_interval_ms)
            p.drawLine(QPointF(x, plot.top()), QPointF(x, plot.bottom()))
        p.setPen(QPen(muted, 1.0))
        p.drawLine(QPointF(plot.left(), plot.bottom()), QPointF(plot.right(), plot.bottom()))
        labels = QRectF(area.left(), plot.bottom(), area.width(), label_h)
        p.drawText(labels, Qt.AlignmentFlag.AlignLeft | Qt.AlignmentFlag.AlignVCenter, t.axis_low)
        p.drawText(labels, Qt.AlignmentFlag.AlignHCenter | Qt.AlignmentFlag.AlignVCenter, t.window)
        p.drawText(labels, Qt.AlignmentFlag.AlignRight | Qt.AlignmentFlag.AlignVCenter, t.axis_high)
