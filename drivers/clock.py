"""Device clocks: counter unwrap and device-to-host time alignment.

Rule: intervals come from device time only. A rig's counter of `wrap` bits is
unwrapped with signed modular differences: a step of more than half the period
forwards is read as a small step backwards (lines logged a few ms out of order
stay in place), never as a wrap. A header line or a board reset starts a new
clock segment with a fresh `Unwrapper`. Host receive time only places device
time on the wall clock: `HostAlignment` fits host = offset + rate * device on
the lower envelope of the samples, because USB and scheduling only ever add
delay.
"""

from __future__ import annotations

import math
from collections import deque


class Unwrapper:
    """Turns a wrapping counter into a monotonic-ish 64-bit count."""

    __slots__ = ("_bits", "_period", "_half", "_mask", "_last_raw", "_total", "_bound")

    def __init__(self, wrap_bits: int = 32, bound: int | None = None) -> None:
        self._bits = wrap_bits
        self._bound = bound  # |count| must stay below this; a step past it is refused (None returned)
        self._period = 1 << wrap_bits if wrap_bits else 0
        self._half = self._period >> 1
        self._mask = self._period - 1
        self._last_raw: int | None = None
        self._total = 0

    def __call__(self, raw: int) -> int | None:
        """The unwrapped count for the next raw counter value; None (state unchanged) past the bound."""
        if not self._period:
            return raw
        last = self._last_raw
        if last is None:
            self._last_raw = raw
            self._total = raw
            return raw
        step = (raw - last) & self._mask
        if step >= self._half:
            step -= self._period
        total = self._total + step
        if self._bound is not None and not -self._bound < total < self._bound:
            return None
        self._last_raw = raw
        self._total = total
        return total

    @property
    def state(self) -> tuple[int, int] | None:
        """(last raw value, unwrapped total) to persist and resume from."""
        return None if self._last_raw is None else (self._last_raw, self._total)

    def restore(self, state: tuple[int, int] | None) -> None:
        """Resume from a persisted `state`."""
        if state is None:
            self._last_raw, self._total = None, 0
        else:
            self._last_raw, self._total = int(state[0]), int(state[1])


class HostAlignment:
    """Straight-line map device seconds -> host seconds from the lower envelope.

    Samples are thinned to the minimum host-minus-device delay per `bucket_s` of
    device time (at most `max_buckets` kept, oldest dropped). The fitted line is
    the one below every kept point that minimises the mean vertical distance to
    them: it touches the lower convex hull at the points' mean device time.
    """

    def __init__(self, bucket_s: float = 5.0, max_buckets: int = 2000) -> None:
        self.bucket_s = bucket_s
        self._buckets: deque[tuple[int, float, float]] = deque(maxlen=max_buckets)
        self._fit: tuple[float, float] | None = None

    def add(self, device_s: float, host_s: float) -> None:
        """One (device time, host receive time) sample, both in seconds."""
        key = math.floor(device_s / self.bucket_s)
        delay = host_s - device_s
        if self._buckets and self._buckets[-1][0] == key:
            if delay < self._buckets[-1][2] - self._buckets[-1][1]:
                self._buckets[-1] = (key, device_s, host_s)
                self._fit = None
            return
        self._buckets.append((key, device_s, host_s))
        self._fit = None

    @property
    def samples(self) -> int:
        return len(self._buckets)

    def fit(self) -> tuple[float, float]:
        """(offset, rate) with host = offset + rate * device; needs one sample."""
        if self._fit is None:
            self._fit = _lower_envelope_line([(d, h) for _, d, h in self._buckets])
        return self._fit

    def to_host(self, device_s: float) -> float:
        offset, rate = self.fit()
        return offset + rate * device_s


def _lower_envelope_line(points: list[tuple[float, float]]) -> tuple[float, float]:
    if not points:
        raise ValueError("no samples to align")
    pts = sorted(points)
    if len(pts) == 1 or pts[0][0] == pts[-1][0]:
        low = min(h - d for d, h in pts)
        return low, 1.0
    hull: list[tuple[float, float]] = []
    for p in pts:
        while len(hull) >= 2 and _cross(hull[-2], hull[-1], p) <= 0:
            hull.pop()
        hull.append(p)
    mean_x = sum(d for d, _ in pts) / len(pts)
    for (x0, y0), (x1, y1) in zip(hull, hull[1:]):
        if x0 <= mean_x <= x1 and x1 > x0:
            rate = (y1 - y0) / (x1 - x0)
            return y0 - rate * x0, rate
    x0, y0 = hull[0]
    return y0 - x0, 1.0


def _cross(o: tuple[float, float], a: tuple[float, float], b: tuple[float, float]) -> float:
    return (a[0] - o[0]) * (b[1] - o[1]) - (a[1] - o[1]) * (b[0] - o[0])
