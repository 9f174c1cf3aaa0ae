"""Confidence intervals for a proportion k/n (rolling and session hit rates).

Rule: `wilson` is the closed-form Wilson score interval (no scipy: the live
path and the recorder must not pay scipy's import). With no trials (n = 0) it
returns the whole range (0, 1). Bounds are clipped to
[0, 1]; k = 0 gives a lower bound of exactly 0 and k = n an upper bound of 1.
`newcombe_difference` is the interval of a difference of two proportions built
from their two Wilson intervals (Newcombe's hybrid score, method 10).
"""

from __future__ import annotations

import math
from functools import lru_cache
from statistics import NormalDist


@lru_cache(maxsize=16)
def _z(confidence: float) -> float:
    return NormalDist().inv_cdf(0.5 + confidence / 2.0)


def _check(k: int, n: int, confidence: float) -> None:
    if not 0 <= k <= n:
        raise ValueError(f"need 0 <= k <= n, got k={k}, n={n}")
    if not 0 < confidence < 1:
        raise ValueError(f"confidence must be in (0, 1), got {confidence}")


def wilson(k: int, n: int, confidence: float = 0.95) -> tuple[float, float]:
    """Wilson score interval for k successes in n trials."""
    _check(k, n, confidence)
    if n == 0:
        return 0.0, 1.0
    z = _z(confidence)
    z2 = z * z
    p = k / n
    centre = p + z2 / (2 * n)
    spread = z * math.sqrt(p * (1 - p) / n + z2 / (4 * n * n))
    scale = 1 + z2 / n
    low = 0.0 if k == 0 else max(0.0, (centre - spread) / scale)
    high = 1.0 if k == n else min(1.0, (centre + spread) / scale)
    return low, high


def newcombe_difference(k1: int, n1: int, k2: int, n2: int, confidence: float = 0.95) -> tuple[float, float, float]:
    """p1 - p2 and its hybrid-score interval from the two Wilson intervals (Newcombe 1998, method 10)."""
    if n1 == 0 or n2 == 0:
        raise ValueError(f"need trials on both sides, got n1={n1}, n2={n2}")
    p1, p2 = k1 / n1, k2 / n2
    l1, u1 = wilson(k1, n1, confidence)
    l2, u2 = wilson(k2, n2, confidence)
    d = p1 - p2
    return d, d - math.sqrt((p1 - l1) ** 2 + (u2 - p2) ** 2), d + math.sqrt((u1 - p1) ** 2 + (p2 - l2) ** 2)
