"""Training protocols (TOML, docs/protocol.md) parsed into frozen values.

Rule: `parse_protocol(text, path)` is pure and refuses any unknown, missing or
wrong key with a `ConfigError` naming file:line and key. `[protocol]` holds the
task and the defaults every stage inherits; `[[stages]]` lists the shaping
stages in training order (the last one is the final stage, where plateau is
judged); without `[[stages]]` there is one stage named "main" built from
`[protocol]`. A window is `tolerance` (a fraction of the target, both sides)
or `window_ms = [low, high]`; edges count as inside, and are computed as exact
rationals of the numbers as written (`exact`, `tolerance_edges`), so that
650 ms x (1 + 0.15) is 747.5 ms, not the binary 747.4999...; `[eligibility]` is kept as
a raw dict for the eligibility rule to interpret. Every key, default and unit
is documented in docs/protocol.md.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass, field
from fractions import Fraction
from typing import Any

from drivers.config import ConfigError, TomlFile

TASKS = ("two_press", "joystick_hold")
MEASURES = ("hit_rate", "fixed_window_fraction", "median_abs_log_error", "cv")
HIGHER_IS_BETTER = {"hit_rate": True, "fixed_window_fraction": True, "median_abs_log_error": False, "cv": False}
RULES = ("consecutive_sessions", "change_point", "slope", "asymptote_fraction")
BINARY_MEASURES = ("hit_rate", "fixed_window_fraction")
DEFAULT_STAGE = "main"
TIMEOUT_TARGETS = 3.0  # default trial_timeout_ms = 3 x target_ms

_TOP_TABLES = {"protocol", "stages", "session", "plateau", "eligibility", "care_limits"}
_STAGE_KEYS = {"target_ms", "tolerance", "window_ms", "adaptive", "iti_ms", "premature_ms",
               "min_hold_ms", "trial_timeout_ms"}
_PROTOCOL_KEYS = _STAGE_KEYS | {"name", "version", "task", "threshold_deg", "reward_ul", "hit_words"}
_ADAPTIVE_KEYS = {"every", "target_rate", "step", "min_tolerance", "max_tolerance"}
_SESSION_KEYS = {"max_minutes", "max_trials", "max_water_ul"}
_PLATEAU_KEYS = {"rule", "measure", "min_hit_rate", "threshold", "sessions", "min_trials",
                 "fixed_window_ms", "crit", "window", "max_slope", "confidence", "fraction",
                 "min_sessions", "chance"}
_NUMBER = (int, float)


@dataclass(frozen=True, slots=True)
class AdaptiveWindow:
    """Every `every` trials the tolerance moves by `step` to hold `target_rate`."""

    every: int
    target_rate: float
    step: float
    min_tolerance: float
    max_tolerance: float


@dataclass(frozen=True, slots=True)
class Stage:
    """One shaping stage: the target, window and timing rules in force."""

    name: str
    target_ms: float
    window_low_ms: float
    window_high_ms: float
    tolerance: float | None  # None when the window was given as window_ms
    adaptive: AdaptiveWindow | None
    iti_ms: float
    premature_ms: float
    min_hold_ms: float
    trial_timeout_ms: float


@dataclass(frozen=True, slots=True)
class SessionLimits:
    """When a session should end (None = no limit)."""

    max_minutes: float | None = None
    max_trials: int | None = None
    max_water_ul: float | None = None


@dataclass(frozen=True, slots=True)
class PlateauRule:
    """The experiment's plateau criterion and its parameters."""

    rule: str = "consecutive_sessions"
    measure: str = "hit_rate"
    threshold: float | None = None  # hit_rate / fixed_window_fraction: >=; error measures: <=
    sessions: int = 3
    min_trials: int = 50
    fixed_window_ms: tuple[float, float] | None = None
    crit: float = 2.0
    window: int = 5
    max_slope: float = 0.02
    confidence: float = 0.95
    fraction: float = 0.9
    min_sessions: int = 5
    chance: float | None = None


@dataclass(frozen=True, slots=True)
class TrainingProtocol:
    """A parsed training protocol."""

    name: str
    version: int
    task: str
    stages: tuple[Stage, ...]
    threshold_deg: float
    reward_ul: float | None
    hit_words: tuple[str, ...]
    session: SessionLimits
    plateau: PlateauRule
    eligibility: dict[str, Any] = field(default_factory=dict)
    path: str = "<protocol>"
    care_limits: dict[str, Any] = field(default_factory=dict)  # checked here, applied by core.care_limits

    @property
    def final_stage(self) -> Stage:
        return self.stages[-1]

    def fixed_window(self, stage: str) -> tuple[float, float]:
        """The fixed window of the fixed-window measure: `[plateau] fixed_window_ms`,
        else the stage's own window as written (never an adapted one)."""
        if self.plateau.fixed_window_ms is not None:
            return self.plateau.fixed_window_ms
        found = self.stage(stage) or self.final_stage
        return found.window_low_ms, found.window_high_ms

    def stage(self, name: str) -> Stage | None:
        """The stage called `name`, or None."""
        for stage in self.stages:
            if stage.name == name:
                return stage
        return None


def exact(value: float | str) -> Fraction:
    """The number as written: a float's shortest round-tripping decimal (0.15 -> 3/20), as an exact rational."""
    return Fraction(value if isinstance(value, str) else repr(float(value)))


def tolerance_edges(target_ms: float, tolerance: float) -> tuple[Fraction, Fraction]:
    """The exact window target x (1 -/+ tolerance) in ms, the low edge no lower than 0."""
    target, tol = exact(target_ms), exact(tolerance)
    return max(Fraction(0), target * (1 - tol)), target * (1 + tol)


def _positive(value: float) -> str | None:
    if not math.isfinite(value):
        return "must be a finite number"
    return None if value > 0 else "must be > 0"


def _not_negative(value: float) -> str | None:
    if not math.isfinite(value):
        return "must be a finite number"
    return None if value >= 0 else "must be >= 0"


def _fraction(value: float) -> str | None:
    return None if 0 <= value <= 1 else "must be between 0 and 1"


def _open_fraction(value: float) -> str | None:
    return None if 0 < value < 1 else "must be between 0 and 1 (exclusive)"


def _window(value: list) -> str | None:
    if len(value) != 2 or not all(isinstance(v, _NUMBER) and not isinstance(v, bool) for v in value):
        return "must be [low, high] in ms"
    if not 0 <= value[0] <= value[1]:
        return "needs 0 <= low <= high"
    return None


class _StageSource:
    """Reads one `[[stages]]` entry (or `[protocol]`) with line-accurate errors."""

    def __init__(self, toml: TomlFile, table: str, values: dict[str, Any], lines: dict[str, int], label: str):
        self.toml, self.table, self.values, self.lines, self.label = toml, table, values, lines, label

    def error(self, key: str, message: str) -> ConfigError:
        if self.table == "protocol":
            return self.toml.error("protocol", key, message)
        line = self.lines.get(key) or self.lines.get("")
        return ConfigError(self.toml.path, line, f"{self.label} {key}".strip(), message)

    def get(self, key: str, kind, default: Any = ..., check=None) -> Any:
        if key not in self.values:
            if default is ...:
                raise self.error(key, "missing key")
            return default
        value = self.values[key]
        kinds = kind if isinstance(kind, tuple) else (kind,)
        if isinstance(value, bool) and bool not in kinds or not isinstance(value, kinds):
            names = " or ".join(k.__name__ for k in kinds)
            raise self.error(key, f"expected {names}, got {value!r}")
        problem = check(value) if check else None
        if problem:
            raise self.error(key, problem)
        return value

    def check_keys(self, allowed: set[str]) -> None:
        for key in self.values:
            if key not in allowed:
                raise self.error(key, f"unknown key (expected one of: {', '.join(sorted(allowed))})")


def _stage_lines(text: str) -> list[dict[str, int]]:
    """For each `[[stages]]` entry, the line of its header ("") and of each key."""
    found: list[dict[str, int]] = []
    inside = False
    for number, line in enumerate(text.splitlines(), start=1):
        header = re.match(r"^\s*(\[\[?)\s*([^\]]+?)\s*\]\]?", line)
        if header:
            inside = header.group(1) == "[[" and header.group(2) == "stages"
            if inside:
                found.append({"": number})
            continue
        key = re.match(r"^\s*([A-Za-z0-9_\-]+)\s*=", line)
        if inside and key:
            found[-1].setdefault(key.group(1), number)
    return found


def _read_stage(src: _StageSource, name: str, base: Stage | None, inherit_timeout: bool = False) -> Stage:
    """A stage from `src`, inheriting what it leaves out from `base`.

    The timeout is inherited only when `[protocol]` gave one (`inherit_timeout`);
    otherwise it is TIMEOUT_TARGETS x this stage's target.
    """
    number = (int, float)
    target = float(src.get("target_ms", number, base.target_ms if base else ..., _positive))
    has_tol, has_win = "tolerance" in src.values, "window_ms" in src.values
    if has_tol and has_win:
        raise src.error("window_ms", "give tolerance or window_ms, not both")
    tolerance: float | None
    if has_win:
        low, high = (float(v) for v in src.get("window_ms", list, check=_window))
        tolerance = None
    elif has_tol or base is None or base.tolerance is not None:
        tolerance = float(src.get("tolerance", number, base.tolerance if base and not has_tol else ..., _not_negative))
        low, high = (float(edge) for edge in tolerance_edges(target, tolerance))
    else:
        low, high, tolerance = base.window_low_ms, base.window_high_ms, None
    adaptive = base.adaptive if base else None
    if "adaptive" in src.values:
        adaptive = _read_adaptive(src, tolerance)
    return Stage(
        name=name,
        target_ms=target,
        window_low_ms=max(0.0, low),
        window_high_ms=high,
        tolerance=tolerance,
        adaptive=adaptive,
        iti_ms=float(src.get("iti_ms", number, base.iti_ms if base else 0.0, _not_negative)),
        premature_ms=float(src.get("premature_ms", number, base.premature_ms if base else 0.0, _not_negative)),
        min_hold_ms=float(src.get("min_hold_ms", number, base.min_hold_ms if base else 0.0, _not_negative)),
        trial_timeout_ms=float(src.get("trial_timeout_ms", number,
                                       base.trial_timeout_ms if inherit_timeout else TIMEOUT_TARGETS * target,
                                       _positive)),
    )


def _read_adaptive(src: _StageSource, tolerance: float | None) -> AdaptiveWindow:
    table = src.get("adaptive", dict)
    if tolerance is None:
        raise src.error("adaptive", "an adaptive window needs a tolerance, not window_ms")
    line = src.lines.get("adaptive") if src.table == "stages" else src.toml.line_of("protocol", "adaptive")
    inner = _StageSource(src.toml, "adaptive", table, {"": line or 0}, f"{src.label} adaptive")
    inner.check_keys(_ADAPTIVE_KEYS)
    number = (int, float)
    rule = AdaptiveWindow(
        every=inner.get("every", int, 20, _positive),
        target_rate=float(inner.get("target_rate", number, check=_open_fraction)),
        step=float(inner.get("step", number, 0.02, _positive)),
        min_tolerance=float(inner.get("min_tolerance", number, 0.05, _not_negative)),
        max_tolerance=float(inner.get("max_tolerance", number, 0.5, _positive)),
    )
    if not rule.min_tolerance <= tolerance <= rule.max_tolerance:
        raise inner.error("min_tolerance", "the starting tolerance must lie within min_tolerance..max_tolerance")
    return rule


def _read_plateau(toml: TomlFile) -> PlateauRule:
    toml.check_keys("plateau", _PLATEAU_KEYS)
    number = (int, float)
    get = toml.get
    rule = get("plateau", "rule", str, "consecutive_sessions",
               lambda v: None if v in RULES else f"expected one of {', '.join(RULES)}")
    measure = get("plateau", "measure", str, "hit_rate",
                  lambda v: None if v in MEASURES else f"expected one of {', '.join(MEASURES)}")
    threshold = get("plateau", "threshold", number, None)
    if "min_hit_rate" in toml.table("plateau", required=False):
        if measure != "hit_rate":
            raise toml.error("plateau", "min_hit_rate", "only for measure = \"hit_rate\" (use threshold)")
        if threshold is not None:
            raise toml.error("plateau", "threshold", "give min_hit_rate or threshold, not both")
        threshold = get("plateau", "min_hit_rate", number, check=_fraction)
    if threshold is not None and measure in BINARY_MEASURES and not 0 <= threshold <= 1:
        raise toml.error("plateau", "threshold", "must be between 0 and 1 for this measure")
    if rule == "consecutive_sessions" and threshold is None and "plateau" in toml.data:
        raise toml.error("plateau", "min_hit_rate" if measure == "hit_rate" else "threshold",
                         "missing key (consecutive_sessions needs a threshold)")
    if rule == "change_point" and measure not in BINARY_MEASURES:
        raise toml.error("plateau", "measure",
                         "change_point works on trial-by-trial hits: hit_rate or fixed_window_fraction")
    window = get("plateau", "fixed_window_ms", list, None, _window)
    chance = get("plateau", "chance", number, None, _open_fraction)
    return PlateauRule(
        rule=rule,
        measure=measure,
        threshold=None if threshold is None else float(threshold),
        sessions=get("plateau", "sessions", int, 3, _positive),
        min_trials=get("plateau", "min_trials", int, 50, _not_negative),
        fixed_window_ms=None if window is None else (float(window[0]), float(window[1])),
        crit=float(get("plateau", "crit", number, 2.0, _positive)),
        window=get("plateau", "window", int, 5, lambda v: None if v >= 3 else "must be >= 3 sessions"),
        max_slope=float(get("plateau", "max_slope", number, 0.02, _positive)),
        confidence=float(get("plateau", "confidence", number, 0.95, _open_fraction)),
        fraction=float(get("plateau", "fraction", number, 0.9, _open_fraction)),
        min_sessions=get("plateau", "min_sessions", int, 5, lambda v: None if v >= 4 else "must be >= 4 sessions"),
        chance=None if chance is None else float(chance),
    )


def _read_session(toml: TomlFile) -> SessionLimits:
    toml.check_keys("session", _SESSION_KEYS)
    number = (int, float)
    minutes = toml.get("session", "max_minutes", number, None, _positive)
    water = toml.get("session", "max_water_ul", number, None, _positive)
    return SessionLimits(
        max_minutes=None if minutes is None else float(minutes),
        max_trials=toml.get("session", "max_trials", int, None, _positive),
        max_water_ul=None if water is None else float(water),
    )


def parse_protocol(text: str, path: str = "<protocol>") -> TrainingProtocol:
    """Parse a protocol file's text; raise ConfigError naming file:line:key."""
    toml = TomlFile(text, path)
    for name in toml.data:
        if name not in _TOP_TABLES:
            raise ConfigError(toml.path, toml.line_of(name), name,
                              f"unknown table (expected one of: {', '.join(sorted(_TOP_TABLES))})")
    toml.check_keys("protocol", _PROTOCOL_KEYS)
    get = toml.get
    name = get("protocol", "name", str, check=lambda v: None if v.strip() else "must not be empty")
    version = get("protocol", "version", int, check=_not_negative)
    task = get("protocol", "task", str, check=lambda v: None if v in TASKS else f"expected one of {', '.join(TASKS)}")
    hit_words = get("protocol", "hit_words", list, ["hit"],
                    lambda v: None if v and all(isinstance(w, str) and w for w in v) else "must be a list of words")
    reward = get("protocol", "reward_ul", (int, float), None, _positive)
    threshold_deg = float(get("protocol", "threshold_deg", (int, float), 10.0, _positive))

    top = _StageSource(toml, "protocol", toml.table("protocol"), {}, "[protocol]")
    base = _read_stage(top, DEFAULT_STAGE, None)
    raw_stages = toml.data.get("stages")
    if raw_stages is None:
        stages: tuple[Stage, ...] = (base,)
    else:
        if not isinstance(raw_stages, list) or not raw_stages:
            raise toml.error("", "stages", "must be one or more [[stages]] tables")
        lines = _stage_lines(text)
        built: list[Stage] = []
        for number, values in enumerate(raw_stages, start=1):
            src = _StageSource(toml, "stages", values, lines[number - 1] if number <= len(lines) else {},
                               f"[[stages]] #{number}")
            src.check_keys(_STAGE_KEYS | {"name"})
            stage_name = src.get("name", str, check=lambda v: None if v.strip() else "must not be empty")
            if any(s.name == stage_name for s in built):
                raise src.error("name", f"stage {stage_name!r} is listed twice")
            built.append(_read_stage(src, stage_name, base, "trial_timeout_ms" in top.values))
        stages = tuple(built)
    eligibility = toml.table("eligibility", required=False)
    care_limits = _read_care_limits(toml)
    return TrainingProtocol(
        name=name,
        version=version,
        task=task,
        stages=stages,
        threshold_deg=threshold_deg,
        reward_ul=None if reward is None else float(reward),
        hit_words=tuple(hit_words),
        session=_read_session(toml),
        plateau=_read_plateau(toml),
        eligibility=dict(eligibility),
        path=path,
        care_limits=care_limits,
    )


def _read_care_limits(toml: TomlFile) -> dict[str, Any]:
    """`[care_limits]`: this protocol's usual weight range (g), largest usual supplement (ml) and reward (µL)."""
    if "care_limits" not in toml.data:
        return {}
    toml.check_keys("care_limits", {"weight_g", "max_supplement_ml", "max_reward_ul"})
    out: dict[str, Any] = {}
    weight = toml.get("care_limits", "weight_g", list, None, _weight_range)
    if weight is not None:
        out["weight_g"] = (float(weight[0]), float(weight[1]))
    supplement = toml.get("care_limits", "max_supplement_ml", (int, float), None, _positive)
    if supplement is not None:
        out["max_supplement_ml"] = float(supplement)
    reward = toml.get("care_limits", "max_reward_ul", (int, float), None, _positive)
    if reward is not None:
        out["max_reward_ul"] = float(reward)
    return out


def _weight_range(value: list) -> str | None:
    if len(value) != 2 or not all(isinstance(v, (int, float)) and not isinstance(v, bool) and math.isfinite(v)
                                  for v in value) or not 0 < value[0] < value[1]:
        return "expected [low, high] in grams, 0 < low < high"
    return None
