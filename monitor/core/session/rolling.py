"""Running statistics that update in O(1) (medians: O(log n)) per value.

Rule: each structure takes one value at a time and answers at any moment
exactly what the batch formula would give on the values seen so far:
`RollingRate` = hits among the last n (Wilson interval), `RunningMoments` =
Welford mean, sample SD (ddof = 1) and CV = SD / mean, `RunningMedian` = the
exact median of everything seen (two heaps; the mean of the two middle values
for an even count, as numpy.median), `WindowMedian` = the exact median of the
last n values (a sorted list of at most n). Non-finite values are refused by
the callers, never stored.
"""

from __future__ import annotations

import heapq
import math
from bisect import bisect_left, insort
from collections import deque

from monitor.core.session.binomial import wilson


class RollingRate:
    """Proportion of successes among the last `size` outcomes."""

    __slots__ = ("_window", "hits", "size")

    def __init__(self, size: int) -> None:
        if size < 1:
            raise ValueError("size must be >= 1")
        self.size = size
        self._window: deque[bool] = deque()
        self.hits = 0

    def add(self, success: bool) -> None:
        window = self._window
        if len(window) == self.size:
            self.hits -= window.popleft()
        window.append(bool(success))
        self.hits += bool(success)

    @property
    def count(self) -> int:
        return len(self._window)

    @property
    def rate(self) -> float:
        return self.hits / len(self._window) if self._window else math.nan

    def interval(self, confidence: float = 0.95) -> tuple[float, float]:
        """Wilson interval of the rate over the window."""
        return wilson(self.hits, len(self._window), confidence)


class RunningMoments:
    """Welford's running mean and variance."""

    __slots__ = ("_m2", "count", "mean")

    def __init__(self) -> None:
        self.count = 0
        self.mean = 0.0
        self._m2 = 0.0

    def add(self, value: float) -> None:
        self.count += 1
        delta = value - self.mean
        self.mean += delta / self.count
        self._m2 += delta * (value - self.mean)

    @property
    def sd(self) -> float:
        """Sample standard deviation (ddof = 1); nan below two values."""
        return math.sqrt(self._m2 / (self.count - 1)) if self.count > 1 else math.nan

    @property
    def cv(self) -> float:
        """SD / mean; nan below two values or at a zero mean."""
        return self.sd / self.mean if self.count > 1 and self.mean != 0 else math.nan


class RunningMedian:
    """Exact median of all values added (a max-heap of the low half, a min-heap of the high half)."""

    __slots__ = ("_high", "_low")

    def __init__(self) -> None:
        self._low: list[float] = []  # negated values
        self._high: list[float] = []

    def add(self, value: float) -> None:
        if self._low and value > -self._low[0]:
            heapq.heappush(self._high, value)
        else:
            heapq.heappush(self._low, -value)
        if len(self._low) > len(self._high) + 1:
            heapq.heappush(self._high, -heapq.heappop(self._low))
        elif len(self._high) > len(self._low):
            heapq.heappush(self._low, -heapq.heappop(self._high))

    @property
    def count(self) -> int:
        return len(self._low) + len(self._high)

    @property
    def median(self) -> float:
        if not self._low:
            return math.nan
        if len(self._low) > len(self._high):
            return -self._low[0]
        return (-self._low[0] + self._high[0]) / 2


class WindowMedian:
    """Exact median of the last `size` values."""

    __slots__ = ("_order", "_sorted", "size")

    def __init__(self, size: int) -> None:
        if size < 1:
            raise ValueError("size must be >= 1")
        self.size = size
        self._order: deque[float] = deque()
        self._sorted: list[float] = []

    def add(self, value: float) -> None:
        if len(self._order) == self.size:
            old = self._order.popleft()
            del self._sorted[bisect_left(self._sorted, old)]
        self._order.append(value)
        insort(self._sorted, value)

    @property
    def median(self) -> float:
        values, n = self._sorted, len(self._sorted)
        if not n:
            return math.nan
        middle = n // 2
        return values[middle] if n % 2 else (values[middle - 1] + values[middle]) / 2
