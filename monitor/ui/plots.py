"""Small helpers for pyqtgraph plots that follow the house rules.

Rule: every plot is made once with both axis labels carrying a unit, colours
from the system palette and tick fonts large enough to read from a metre
away; data items are created once by the panels and only ever `setData`-ed.
Long series get clip-to-view and peak downsampling. Axis ranges are set by
the panels (`RangeKeeper`), not by pyqtgraph's auto-range, which repaints a
plot a second time whenever the data move; ranges grow in round steps, so
they change rarely.
"""

from __future__ import annotations

import pyqtgraph as pg
import math

from PySide6.QtGui import QColor, QFont
from PySide6.QtWidgets import QGraphicsItem

from monitor.ui.theme import colour, plot_colours

LABEL_STYLE = {"font-size": "11pt"}


def make_plot(x_label: str, y_label: str) -> pg.PlotWidget:
    """A PlotWidget with labelled axes (text includes the unit), no mouse zoom by default."""
    background, foreground = plot_colours()
    widget = pg.PlotWidget(background=background)
    item = widget.getPlotItem()
    tick_font = QFont()
    tick_font.setPointSize(10)
    for side, text in (("bottom", x_label), ("left", y_label)):
        axis = item.getAxis(side)
        axis.setPen(pg.mkPen(foreground))
        axis.setTextPen(pg.mkPen(foreground))
        axis.setStyle(tickFont=tick_font, hideOverlappingLabels=18)   # the last tick's label may overhang
        axis.setLabel(text, **LABEL_STYLE)
        axis.setCacheMode(QGraphicsItem.CacheMode.DeviceCoordinateCache)
    item.setContentsMargins(0, 4, 18, 0)   # room for that overhang at the right
    item.showGrid(x=False, y=True, alpha=0.15)
    item.setMenuEnabled(False)
    widget.setMouseEnabled(x=False, y=False)
    item.hideButtons()
    widget.setMinimumHeight(150)
    return widget


def axis_label(widget: pg.PlotWidget, side: str) -> str:
    """The label text of one axis (tests read it)."""
    return widget.getPlotItem().getAxis(side).labelText


def translucent(name: str, alpha: int) -> QColor:
    c = colour(name)
    c.setAlpha(alpha)
    return c


def long_series(item: pg.PlotDataItem) -> pg.PlotDataItem:
    """Set the options a series of thousands of points needs."""
    item.setClipToView(True)
    item.setDownsampling(auto=True, method="peak")
    return item


def nice_ceiling(value: float) -> float:
    """`value` rounded up to a multiple of half its leading power of ten (315 -> 350, 87 -> 90);
    1 for value <= 0 or not finite."""
    if not math.isfinite(value) or value <= 0:
        return 1.0
    step = 10.0 ** math.floor(math.log10(value)) / 2
    return math.ceil(value / step - 1e-9) * step


class RangeKeeper:
    """Sets a plot's axis ranges only when they change."""

    def __init__(self, widget: pg.PlotWidget) -> None:
        self.widget = widget
        self.x: tuple[float, float] | None = None
        self.y: tuple[float, float] | None = None
        widget.getPlotItem().disableAutoRange()

    def set_x(self, low: float, high: float, padding: float = 0.02) -> None:
        if (low, high) != self.x and math.isfinite(low) and math.isfinite(high) and high > low:
            self.x = (low, high)
            self.widget.setXRange(low, high, padding=padding)

    def set_y(self, low: float, high: float, padding: float = 0.02) -> None:
        if (low, high) != self.y and math.isfinite(low) and math.isfinite(high) and high > low:
            self.y = (low, high)
            self.widget.setYRange(low, high, padding=padding)
