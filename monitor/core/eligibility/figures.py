"""An animal's figures at one moment: the facts an eligibility rule is judged on.

Rule: `AnimalFigures` is a deep-frozen value (its mappings are read-only
copies, non-finite numbers become None = "not known"), built by the caller
from the store and the analysis core after each session or live. It holds
plateau (reached in the final stage, and at which session), the counts since
plateau, the transparent measures by name (`TRANSPARENT_MEASURES`), the
model-based slow-state fraction (estimate, 90 % interval, status word), the
protocol in force and forecasts per group as ranges of sessions. Counting
convention: `sessions_since_plateau` is 0 at the plateau session itself; a
forecast `opens_in`/`closes_in` of (n, m) means the window's state is expected
to change at the n-th to m-th next session. `to_dict`/`from_dict` give the
plain form that decision snapshots keep.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from types import MappingProxyType
from typing import Any, Mapping

# Transparent measures, by the names rules use (docs/eligibility.md says what each means).
TRANSPARENT_MEASURES = ("hit_rate", "fixed_window_fraction", "interval_error", "cv", "start_drop")
SINCE_PLATEAU = ("sessions_since_plateau", "trials_since_plateau")


def _number(value: Any) -> float | None:
    """A finite float, or None for missing / non-numeric / non-finite values."""
    if value is None or isinstance(value, bool) or not isinstance(value, (int, float)):
        return None
    return float(value) if math.isfinite(value) else None


def _count(value: Any) -> int | None:
    if value is None or isinstance(value, bool) or not isinstance(value, int):
        return None
    return value


def _session_range(value: Any) -> tuple[int, int] | None:
    """(low, high) sessions with 0 <= low <= high, else None."""
    if value is None:
        return None
    try:
        low, high = value
    except (TypeError, ValueError):
        return None
    if _count(low) is None or _count(high) is None or not 0 <= low <= high:
        return None
    return (low, high)


@dataclass(frozen=True, slots=True)
class SessionForecast:
    """Forecast for one group's model condition, in sessions from now (ranges)."""

    opens_in: tuple[int, int] | None = None
    closes_in: tuple[int, int] | None = None

    def __post_init__(self) -> None:
        object.__setattr__(self, "opens_in", _session_range(self.opens_in))
        object.__setattr__(self, "closes_in", _session_range(self.closes_in))


@dataclass(frozen=True, slots=True)
class AnimalFigures:
    """Everything an eligibility rule looks at for one animal, frozen."""

    animal: str
    protocol_name: str
    protocol_version: int
    session: int | None = None  # index of the latest session these figures include
    plateau_reached: bool = False
    plateau_session: int | None = None
    sessions_since_plateau: int | None = None
    trials_since_plateau: int | None = None
    measures: Mapping[str, float | None] = field(default_factory=dict)
    slow_estimate: float | None = None
    slow_low: float | None = None
    slow_high: float | None = None
    slow_status: str | None = None
    trials_per_session: tuple[float, float] | None = None  # recent (fewest, most)
    forecast: Mapping[str, SessionForecast] = field(default_factory=dict)

    def __post_init__(self) -> None:
        put = lambda name, value: object.__setattr__(self, name, value)  # noqa: E731
        put("measures", MappingProxyType({str(k): _number(v) for k, v in dict(self.measures).items()}))
        slow = tuple(_number(getattr(self, name)) for name in ("slow_estimate", "slow_low", "slow_high"))
        if None in slow or not 0 <= slow[1] <= slow[0] <= slow[2] <= 1:
            slow = (None, None, None)  # incomplete or inconsistent: not available, never half-used
        for name, value in zip(("slow_estimate", "slow_low", "slow_high"), slow):
            put(name, value)
        for name in ("session", "plateau_session", "sessions_since_plateau", "trials_since_plateau"):
            put(name, _count(getattr(self, name)))
        put("plateau_reached", bool(self.plateau_reached))
        tps = self.trials_per_session
        if tps is not None:
            low, high = (_number(v) for v in tps) if len(tps) == 2 else (None, None)
            tps = (low, high) if low is not None and high is not None and 0 < low <= high else None
        put("trials_per_session", tps)
        forecasts = {}
        for group, value in dict(self.forecast).items():
            forecasts[str(group)] = value if isinstance(value, SessionForecast) else SessionForecast(**dict(value))
        put("forecast", MappingProxyType(forecasts))

    def measure(self, name: str) -> float | None:
        """A transparent measure or since-plateau count by name (None = not known)."""
        if name in SINCE_PLATEAU:
            value = getattr(self, name)
            return None if value is None else float(value)
        return self.measures.get(name)

    def to_dict(self) -> dict[str, Any]:
        """Plain, JSON-ready copy (new containers every call)."""
        return {
            "animal": self.animal,
            "protocol_name": self.protocol_name,
            "protocol_version": self.protocol_version,
            "session": self.session,
            "plateau_reached": self.plateau_reached,
            "plateau_session": self.plateau_session,
            "sessions_since_plateau": self.sessions_since_plateau,
            "trials_since_plateau": self.trials_since_plateau,
            "measures": dict(sorted(self.measures.items())),
            "slow_estimate": self.slow_estimate,
            "slow_low": self.slow_low,
            "slow_high": self.slow_high,
            "slow_status": self.slow_status,
            "trials_per_session": None if self.trials_per_session is None else list(self.trials_per_session),
            "forecast": {group: {"opens_in": None if f.opens_in is None else list(f.opens_in),
                                 "closes_in": None if f.closes_in is None else list(f.closes_in)}
                         for group, f in sorted(self.forecast.items())},
        }

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> "AnimalFigures":
        """Inverse of `to_dict`."""
        values = dict(data)
        tps = values.get("trials_per_session")
        values["trials_per_session"] = None if tps is None else tuple(tps)
        values["forecast"] = {g: SessionForecast(**f) for g, f in dict(values.get("forecast") or {}).items()}
        return cls(**values)
