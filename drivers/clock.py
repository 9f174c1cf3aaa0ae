"""Device clocks: counter unwrap.

Rule: intervals come from device time only. A rig's counter of `wrap` bits is
unwrapped with signed modular differences: a step of more than half the period
forwards is read as a small step backwards (lines logged a few ms out of order
stay in place), never as a wrap. A header line or a board reset starts a new
clock segment with a fresh `Unwrapper`.
"""

from __future__ import annotations


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
