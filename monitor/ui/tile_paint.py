"""How an overview tile is laid out and drawn: a cached static layer under a few dynamic calls.

Rule: everything here is plain QPainter work on the GUI thread, split so that a
tile's paint does as little as possible. `TileLayout` holds the rectangles and
fonts of one tile size and is rebuilt only when the size or the font changes.
`paint_static` draws what changes rarely (frame, header, badge, connection
shape and word, captions, the window band, the axis and its labels) into a
pixmap the widget keeps while `static_key` stays the same; `paint_dynamic`
draws what a trial changes (clock, trial count, hit rate and its interval,
last interval, histogram bars and the last-interval marker) over it.
`histogram_bars` turns counts into bar fractions of the plot once per state, so
a paint only scales them. Text is drawn with QPainter (never markup).
"""

from __future__ import annotations

import math
from typing import TYPE_CHECKING, Hashable, NamedTuple

from PySide6.QtCore import QPointF, QRect, QRectF, Qt
from PySide6.QtGui import QColor, QFont, QFontMetricsF, QPainter, QPalette, QPen

from monitor.ui.models import RigTileState
from monitor.ui.theme import SEVERITY_COLOUR, colour, draw_shape

if TYPE_CHECKING:
    from monitor.ui.tile import TileTexts

LEFT = Qt.AlignmentFlag.AlignLeft | Qt.AlignmentFlag.AlignVCenter
RIGHT = Qt.AlignmentFlag.AlignRight | Qt.AlignmentFlag.AlignVCenter
CENTRE = Qt.AlignmentFlag.AlignHCenter | Qt.AlignmentFlag.AlignVCenter

Bar = tuple[float, float, float]   # left and width as fractions of the plot's width, height as a fraction of its height


def histogram_bars(counts: tuple[int, ...], edges: tuple[float, ...]) -> tuple[Bar, ...]:
    """Non-empty bins as (left, width, height) fractions of the plot, the tallest bin filling it."""
    if not counts:
        return ()
    lo, span, peak = edges[0], (edges[-1] - edges[0]) or 1.0, max(counts) or 1
    return tuple(((left - lo) / span, (right - left) / span, count / peak)
                 for count, left, right in zip(counts, edges[:-1], edges[1:]) if count)


def _font(base: QFont, pixels: float, bold: bool = False) -> QFont:
    font = QFont(base)
    font.setPixelSize(max(9, int(pixels)))
    font.setBold(bold)
    return font


class TextSlot(NamedTuple):
    """Where a dynamic text goes: drawn at a point (no per-paint text layout), left- or right-aligned."""

    font: QFont
    metrics: QFontMetricsF
    x: float               # where the text starts (left) or ends (right)
    baseline: float
    right: bool


def text_slot(rect: QRectF, font: QFont, right: bool) -> TextSlot:
    """A slot vertically centred in `rect`, as `drawText(rect, AlignVCenter, ...)` would place the text."""
    metrics = QFontMetricsF(font)
    baseline = rect.top() + (rect.height() - metrics.height()) / 2 + metrics.ascent()
    return TextSlot(font, metrics, rect.right() if right else rect.left(), baseline, right)


def draw_in(p: QPainter, slot: TextSlot, text: str) -> None:
    """Draw `text` in its slot (plain text: QPainter never reads markup)."""
    p.setFont(slot.font)
    p.drawText(QPointF(slot.x - slot.metrics.horizontalAdvance(text) if slot.right else slot.x, slot.baseline), text)


class TileLayout(NamedTuple):
    """Rectangles and fonts of one tile size (built by `layout_for`)."""

    width: float
    height: float
    unit: float
    header: QRectF
    badge: QRectF
    shape_centre: QPointF
    state_line: QRectF
    caption: QRectF
    plot: QRectF | None            # None when the tile is too small for a histogram
    labels: QRectF
    title_font: QFont
    animal_font: QFont
    state_font: QFont
    small_font: QFont
    axis_font: QFont
    badge_font: QFont
    clock: TextSlot
    numeral: TextSlot
    hit_rate: TextSlot
    last_interval: TextSlot
    hit_interval: TextSlot


def layout_for(width: float, height: float, base: QFont, has_badge: bool) -> TileLayout:
    """The layout of a `width` × `height` tile in the widget's font `base`."""
    unit = min(height / 9.0, width / 14.0)   # one "line" of the tile
    pad = unit * 0.45
    badge_w = unit * 1.6 if has_badge else 0.0
    header = QRectF(pad, pad * 0.6, width - 2 * pad - badge_w, unit * 1.2)
    state_y = pad * 0.6 + unit * 1.3
    state_line = QRectF(pad + unit, state_y, width - 2 * pad - unit, unit)
    y = state_y + unit * 1.1
    left_w = width * 0.46
    right = QRectF(pad + left_w, y, width - 2 * pad - left_w, unit)
    numeral = QRectF(pad, y, left_w, unit * 2.5)
    regular, small = _font(base, unit * 0.8), _font(base, unit * 0.7)
    top = y + unit * 3.3
    area = QRectF(pad, top, width - 2 * pad, height - top - pad * 0.5)
    label_h = unit * 0.75
    plot = QRectF(area.left(), area.top(), area.width(), area.height() - label_h)
    return TileLayout(
        width=width, height=height, unit=unit, header=header,
        badge=QRectF(width - pad - badge_w, pad * 0.6, badge_w, unit * 1.2),
        shape_centre=QPointF(pad + unit * 0.4, state_y + unit * 0.5), state_line=state_line,
        caption=QRectF(pad, y + unit * 2.4, left_w, unit * 0.8), plot=plot if plot.height() >= 8 else None,
        labels=QRectF(area.left(), plot.bottom(), area.width(), label_h),
        title_font=_font(base, unit * 0.95, True), animal_font=_font(base, unit * 0.95),
        state_font=_font(base, unit * 0.8, True), small_font=small, axis_font=_font(base, unit * 0.65),
        badge_font=_font(base, unit * 1.2 * 0.75, True),
        clock=text_slot(state_line, regular, True), numeral=text_slot(numeral, _font(base, unit * 2.4, True), False),
        hit_rate=text_slot(right.adjusted(0, 0, 0, unit * 0.2), _font(base, unit * 1.05, True), True),
        last_interval=text_slot(right.translated(0, unit * 2.1), regular, True),
        hit_interval=text_slot(right.translated(0, unit * 1.15), small, True))


def static_key(state: RigTileState, texts: TileTexts) -> Hashable:
    """What the static layer of a tile depends on besides its size, focus and palette."""
    return (texts.title, texts.animal, state.connection, texts.badge, state.alert_severity, bool(state.hist_counts),
            state.hist_edges_ms[:1] + state.hist_edges_ms[-1:], state.window_low_ms, state.window_high_ms,
            texts.window, texts.axis_low, texts.axis_high, texts.trials_caption)


def _x_of(plot: QRectF, state: RigTileState, ms: float) -> float:
    lo, hi = state.hist_edges_ms[0], state.hist_edges_ms[-1]
    return plot.left() + (min(max(ms, lo), hi) - lo) / ((hi - lo) or 1.0) * plot.width()


def paint_static(p: QPainter, lay: TileLayout, state: RigTileState, texts: TileTexts, palette: QPalette,
                 focused: bool) -> None:
    """Frame, header, badge, connection shape and word, captions, window band, axis and its labels."""
    text = palette.color(QPalette.ColorRole.WindowText)
    muted = palette.color(QPalette.ColorRole.PlaceholderText)
    w, h, unit = lay.width, lay.height, lay.unit
    p.setRenderHint(QPainter.RenderHint.Antialiasing, True)
    frame = colour(state.connection.colour) if state.connection.word != "live" else palette.color(QPalette.ColorRole.Mid)
    p.setPen(QPen(palette.color(QPalette.ColorRole.Highlight) if focused else frame, 3.0 if focused else 1.5))
    p.setBrush(palette.color(QPalette.ColorRole.Base))
    p.drawRoundedRect(QRectF(1.5, 1.5, w - 3, h - 3), 6, 6)

    # header: rig and animal, alert badge at the right
    p.setPen(text)
    p.setFont(lay.title_font)
    rig_w = QFontMetricsF(lay.title_font).horizontalAdvance(texts.title + "  ")
    p.drawText(lay.header, LEFT, texts.title)
    p.setFont(lay.animal_font)
    p.drawText(lay.header.adjusted(rig_w, 0, 0, 0), LEFT,
               p.fontMetrics().elidedText(texts.animal, Qt.TextElideMode.ElideRight, int(lay.header.width() - rig_w)))
    if texts.badge and state.alert_severity is not None:
        _paint_badge(p, lay, texts.badge, colour(SEVERITY_COLOUR[state.alert_severity.word]),
                     state.alert_severity.shape)

    # state line: shape + word (the clock is dynamic)
    draw_shape(p, state.connection.shape, lay.shape_centre, unit * 0.75, colour(state.connection.colour))
    p.setPen(text)
    p.setFont(lay.state_font)
    p.drawText(lay.state_line, LEFT, texts.state)
    p.setPen(muted)
    p.setFont(lay.small_font)
    p.drawText(lay.caption, Qt.AlignmentFlag.AlignLeft, texts.trials_caption)

    # the histogram's frame: window band, axis, labels (bars and marker are dynamic)
    plot = lay.plot
    if plot is None:
        return
    p.setFont(lay.axis_font)
    if not state.hist_counts:
        p.drawText(plot, Qt.AlignmentFlag.AlignCenter, "no intervals yet")
        return
    if state.window_low_ms is not None and state.window_high_ms is not None:
        shade = colour("bluish_green")
        shade.setAlpha(60)
        left = _x_of(plot, state, state.window_low_ms)
        p.fillRect(QRectF(left, plot.top(), _x_of(plot, state, state.window_high_ms) - left, plot.height()), shade)
    p.setPen(QPen(muted, 1.0))
    p.drawLine(QPointF(plot.left(), plot.bottom()), QPointF(plot.right(), plot.bottom()))
    p.drawText(lay.labels, LEFT, texts.axis_low)
    p.drawText(lay.labels, CENTRE, texts.window)
    p.drawText(lay.labels, RIGHT, texts.axis_high)


def _paint_badge(p: QPainter, lay: TileLayout, label: str, fill: QColor, shape: str) -> None:
    rect = lay.badge
    p.save()
    p.setPen(Qt.PenStyle.NoPen)
    p.setBrush(fill)
    p.drawRoundedRect(rect, rect.height() / 2, rect.height() / 2)
    draw_shape(p, shape, QPointF(rect.left() + rect.height() * 0.45, rect.center().y()), rect.height() * 0.5,
               QColor("#000000"))
    p.setPen(QColor("#000000"))
    p.setFont(lay.badge_font)
    p.drawText(rect.adjusted(rect.height() * 0.7, 0, 0, 0), Qt.AlignmentFlag.AlignCenter, label)
    p.restore()


class Inks(NamedTuple):
    """Colours of the dynamic layer (from the palette and the Okabe–Ito set)."""

    text: QColor
    muted: QColor
    bars: QColor
    marker: QPen


def inks(palette: QPalette) -> Inks:
    """The dynamic layer's colours for `palette`."""
    return Inks(palette.color(QPalette.ColorRole.WindowText), palette.color(QPalette.ColorRole.PlaceholderText),
                colour("blue"), QPen(colour("orange"), 2.5))


def paint_dynamic(p: QPainter, lay: TileLayout, state: RigTileState, texts: TileTexts, bars: tuple[Bar, ...],
                  ink: Inks) -> None:
    """Clock, trial count, hit rate and interval, last interval, histogram bars and the last-interval marker."""
    p.setPen(ink.text)
    draw_in(p, lay.clock, texts.clock)
    draw_in(p, lay.numeral, texts.trials)
    draw_in(p, lay.hit_rate, texts.hit_rate)
    draw_in(p, lay.last_interval, texts.last_interval)
    p.setPen(ink.muted)
    draw_in(p, lay.hit_interval, texts.hit_interval)
    plot = lay.plot
    if plot is None or not bars:
        return
    left, width, base, height = plot.left(), plot.width(), int(plot.bottom()), plot.height() - 1.0
    p.setPen(Qt.PenStyle.NoPen)
    p.setBrush(ink.bars)      # whole pixels, no antialiasing: crisp bars on the axis, the cheapest fill
    p.drawRects([QRect(round(left + x * width), base - (h := max(1, round(f * height))),
                       max(1, round(w * width) - 1), h) for x, w, f in bars])
    if state.last_interval_ms is not None and math.isfinite(state.last_interval_ms):
        p.setRenderHint(QPainter.RenderHint.Antialiasing, True)
        p.setPen(ink.marker)
        x = _x_of(plot, state, state.last_interval_ms)
        p.drawLine(QPointF(x, plot.top()), QPointF(x, plot.bottom()))
