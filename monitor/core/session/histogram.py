"""Interval histograms with fixed bins, filled one value at a time.

Rule: bins follow numpy.histogram exactly: bin i holds edges[i] <= x <
edges[i+1], the last bin also holds x == edges[-1], values outside the edges
or not finite are not binned (they are counted as `outside`). Linear edges are
numpy.linspace(low, high, n + 1); log-spaced edges numpy.geomspace. Adding a
value is a bisection over the (fixed) edges. `IntervalHistograms` keeps today's
counts beside the pooled counts of previous sessions; snapshots are read-only
numpy copies.
"""

from __future__ import annotations

import math
from bisect import bisect_right
from collections.abc import Iterable
from typing import NamedTuple

import numpy as np


def linear_edges(low: float, high: float, bins: int) -> np.ndarray:
    """`bins` equal bins from `low` to `high` (as numpy.histogram(range=...))."""
    return np.linspace(low, high, bins + 1)


def log_edges(low: float, high: float, bins: int) -> np.ndarray:
    """`bins` log-spaced bins from `low` to `high` (both > 0)."""
    if low <= 0:
        raise ValueError("log-spaced bins need low > 0")
    return np.geomspace(low, high, bins + 1)


def _frozen(array: np.ndarray) -> np.ndarray:
    array = np.array(array, copy=True)
    array.flags.writeable = False
    return array


class Histogram:
    """Counts per bin over fixed edges."""

    __slots__ = ("_counts", "_edge_list", "_last", "edges", "outside")

    def __init__(self, edges: np.ndarray) -> None:
        edges = np.asarray(edges, dtype=float)
        if edges.ndim != 1 or len(edges) < 2 or np.any(np.diff(edges) <= 0):
            raise ValueError("edges must be at least two increasing numbers")
        self.edges = _frozen(edges)
        self._edge_list = edges.tolist()
        self._last = len(edges) - 2
        self._counts = [0] * (len(edges) - 1)
        self.outside = 0

    def add(self, value: float) -> None:
        edges = self._edge_list
        if not (edges[0] <= value <= edges[-1]):  # also refuses nan
            self.outside += 1
            return
        self._counts[min(bisect_right(edges, value) - 1, self._last)] += 1

    def extend(self, values: Iterable[float]) -> None:
        for value in values:
            self.add(value)

    def merge(self, other: Histogram) -> None:
        """Add `other`'s counts (same edges)."""
        if other._edge_list != self._edge_list:
            raise ValueError("histograms have different edges")
        self._counts = [a + b for a, b in zip(self._counts, other._counts, strict=True)]
        self.outside += other.outside

    @property
    def counts(self) -> np.ndarray:
        return _frozen(np.array(self._counts, dtype=np.int64))

    @property
    def total(self) -> int:
        return sum(self._counts)


class HistogramSnapshot(NamedTuple):
    """Read-only edges and counts for one bin layout."""

    edges: np.ndarray
    today: np.ndarray
    previous: np.ndarray
    today_outside: int


class IntervalHistograms:
    """Today's intervals against previous sessions', on one bin layout."""

    def __init__(self, edges: np.ndarray, previous: Iterable[float] = ()) -> None:
        self.today = Histogram(edges)
        self.previous = Histogram(edges)
        self.previous.extend(previous)

    def add(self, interval_ms: float) -> None:
        if math.isfinite(interval_ms):
            self.today.add(interval_ms)

    def end_session(self) -> None:
        """Pool today's counts into the previous sessions' and start afresh."""
        self.previous.merge(self.today)
        self.today = Histogram(self.today.edges)

    def snapshot(self) -> HistogramSnapshot:
        return HistogramSnapshot(self.today.edges, self.today.counts, self.previous.counts, self.today.outside)
