"""The cohort's effects against the stage at manipulation: a straight-line trend and a table by group.

Rule: each animal contributes one point per manipulation: x is its stage
when the manipulation was made (by default the slow-state fraction of the
consolidation fit at the last session before it), y its effect on one
measure. The trend is an ordinary least-squares line y = a + b x over the
points of one role (test or control) with a Student t interval for the slope
and for the line (n - 2 degrees of freedom, the spread of the points around
the line as its error, so animal-to-animal differences widen it); it is not
computed for fewer than 3 points or when every x is the same. The uncertainty
of x (the fraction's interval) is not in the fit: an uncertain x pulls the
slope towards 0 (regression dilution), which the documentation says. The
table gives, per group and role, the number of animals and their mean effect
with a t interval (none for a single animal). Groups arrive as the caller
names them (a blinded cohort's codes); this module never unblinds. Pure.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import NamedTuple

import numpy as np
from scipy import stats

LEVEL = 0.95


class Point(NamedTuple):
    """One manipulation of one animal on the cohort plot."""

    animal: str
    group: str | None
    role: str  # "test" | "control"
    x: float
    x_low: float | None
    x_high: float | None
    y: float
    y_low: float | None
    y_high: float | None


@dataclass(frozen=True)
class Trend:
    """y = intercept + slope * x with t intervals; `line` gives the fitted line's interval on a grid."""

    n: int
    slope: float
    slope_low: float
    slope_high: float
    intercept: float
    residual_sd: float
    x_mean: float
    sxx: float
    t: float

    def line(self, x: Sequence[float] | np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """(fit, low, high) of the mean effect at each x."""
        x = np.asarray(x, float)
        fit = self.intercept + self.slope * x
        half = self.t * self.residual_sd * np.sqrt(1 / self.n + (x - self.x_mean) ** 2 / self.sxx)
        return fit, fit - half, fit + half

    def to_dict(self) -> dict[str, float | int]:
        return {"n": self.n, "slope": self.slope, "slope_low": self.slope_low, "slope_high": self.slope_high,
                "intercept": self.intercept, "residual_sd": self.residual_sd}


def trend(x: Sequence[float], y: Sequence[float], level: float = LEVEL) -> Trend | None:
    """The least-squares line through (x, y) with its slope's t interval; None when it cannot be fitted."""
    xs, ys = np.asarray(x, float), np.asarray(y, float)
    keep = np.isfinite(xs) & np.isfinite(ys)
    xs, ys = xs[keep], ys[keep]
    n = len(xs)
    if n < 3:
        return None
    x_mean = float(xs.mean())
    sxx = float(((xs - x_mean) ** 2).sum())
    if sxx <= 0:
        return None
    slope = float(((xs - x_mean) * (ys - ys.mean())).sum() / sxx)
    intercept = float(ys.mean() - slope * x_mean)
    residual = ys - intercept - slope * xs
    sd = math.sqrt(float((residual ** 2).sum()) / (n - 2))
    t = float(stats.t.ppf(0.5 + level / 2, n - 2))
    half = t * sd / math.sqrt(sxx)
    return Trend(n, slope, slope - half, slope + half, intercept, sd, x_mean, sxx, t)


class GroupRow(NamedTuple):
    """One line of the table by group."""

    group: str | None
    role: str
    n: int
    mean: float
    low: float | None
    high: float | None

    def to_dict(self) -> dict[str, object]:
        return self._asdict()


def group_table(points: Sequence[Point], level: float = LEVEL) -> list[GroupRow]:
    """Per (group, role): animals, mean effect and its t interval; groups sorted by name, test before control."""
    keys = sorted({(p.group, p.role) for p in points}, key=lambda k: (k[0] or "", k[1] != "test", k[1]))
    rows = []
    for group, role in keys:
        ys = np.array([p.y for p in points if p.group == group and p.role == role], float)
        mean = float(ys.mean())
        low = high = None
        if len(ys) > 1:
            half = float(stats.t.ppf(0.5 + level / 2, len(ys) - 1) * ys.std(ddof=1) / math.sqrt(len(ys)))
            low, high = mean - half, mean + half
        rows.append(GroupRow(group, role, len(ys), mean, low, high))
    return rows
