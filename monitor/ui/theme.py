"""Colours, shapes and fonts shared by every screen.

Rule: state colours come only from the Okabe–Ito palette (a published
colour-vision-safe set) and are never the only cue: each state also has a word
and a shape (`draw_shape`). Background and text follow the system palette
(QPalette; the main window re-reads it when the palette or QStyleHints' colour
scheme changes), so the screens are light or dark as the desktop is. Text from
devices and files never reaches Qt's markup renderer (`plain_tooltip`).
"""

from __future__ import annotations

import html

from PySide6.QtCore import QPointF, QRectF, Qt
from PySide6.QtGui import QColor, QGuiApplication, QPainter, QPainterPath, QPalette, QPen, QPolygonF

OKABE_ITO: dict[str, str] = {
    "black": "#000000",
    "orange": "#E69F00",
    "sky_blue": "#56B4E9",
    "bluish_green": "#009E73",
    "yellow": "#F0E442",
    "blue": "#0072B2",
    "vermillion": "#D55E00",
    "reddish_purple": "#CC79A7",
}

SEVERITY_COLOUR = {"info": "sky_blue", "attention": "orange", "urgent": "vermillion"}

ADVISORY = ("Advisory: the approved animal-use protocol, the animal-care committee "
            "and the veterinarian decide.")


def colour(name: str) -> QColor:
    """An Okabe–Ito colour by name."""
    return QColor(OKABE_ITO[name])


def plain_tooltip(text: str) -> str:
    """A tooltip that shows `text` literally (Qt would otherwise render markup in it)."""
    return "<p style='white-space:pre-wrap'>" + html.escape(text) + "</p>"


def plot_colours() -> tuple[str, str]:
    """(background, foreground) for pyqtgraph plots from the system palette."""
    palette = QGuiApplication.palette()
    return (palette.color(QPalette.ColorRole.Base).name(),
            palette.color(QPalette.ColorRole.Text).name())


def draw_shape(painter: QPainter, shape: str, centre: QPointF, size: float, fill: QColor) -> None:
    """Draw a state shape (disc, ring, triangle, diamond, square, tick, cross) of width `size`."""
    r = size / 2.0
    x, y = centre.x(), centre.y()
    outline = QPen(fill.darker(150), max(1.0, size / 8.0))
    painter.save()
    painter.setRenderHint(QPainter.RenderHint.Antialiasing, True)
    if shape == "disc":
        painter.setPen(outline)
        painter.setBrush(fill)
        painter.drawEllipse(QRectF(x - r, y - r, size, size))
    elif shape == "ring":
        painter.setPen(QPen(fill, max(2.0, size / 5.0)))
        painter.setBrush(Qt.BrushStyle.NoBrush)
        painter.drawEllipse(QRectF(x - r * 0.8, y - r * 0.8, size * 0.8, size * 0.8))
    elif shape == "triangle":
        painter.setPen(outline)
        painter.setBrush(fill)
        painter.drawPolygon(QPolygonF([QPointF(x, y - r), QPointF(x + r, y + r * 0.8),
                                       QPointF(x - r, y + r * 0.8)]))
    elif shape == "diamond":
        painter.setPen(outline)
        painter.setBrush(fill)
        painter.drawPolygon(QPolygonF([QPointF(x, y - r), QPointF(x + r, y),
                                       QPointF(x, y + r), QPointF(x - r, y)]))
    elif shape == "square":
        painter.setPen(outline)
        painter.setBrush(fill)
        painter.drawRect(QRectF(x - r * 0.85, y - r * 0.85, size * 0.85, size * 0.85))
    elif shape == "tick":
        path = QPainterPath()
        path.moveTo(x - r, y)
        path.lineTo(x - r * 0.25, y + r * 0.7)
        path.lineTo(x + r, y - r * 0.7)
        painter.setPen(QPen(fill, max(2.0, size / 5.0), Qt.PenStyle.SolidLine, Qt.PenCapStyle.RoundCap))
        painter.drawPath(path)
    elif shape == "cross":
        path = QPainterPath()
        path.moveTo(x - r, y - r)
        path.lineTo(x + r, y + r)
        path.moveTo(x + r, y - r)
        path.lineTo(x - r, y + r)
        painter.setPen(QPen(fill, max(2.5, size / 4.0), Qt.PenStyle.SolidLine, Qt.PenCapStyle.RoundCap))
        painter.drawPath(path)
    else:
        raise ValueError(f"unknown shape {shape!r}")
    painter.restore()
