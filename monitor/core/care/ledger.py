"""Daily water ledger and care alerts for animals on water restriction (advisory).

Rule: a care day is the local calendar date of each record's own timestamp
(aware datetimes). Per animal and day: water earned in sessions (care.water)
plus supplements = total, against the daily minimum of the `[care]` table
(ml/day, or ml/kg/day × the latest weight on or before the day, or the larger
of the two when both are set); owed = minimum − total when positive. Weight is
the day's last weighing, or else the latest earlier one, as a percent of the
baseline. The minimum is species-aware: ml per 100 g body weight from the
lab's `[care.species]` figure for the animal's recorded species, else the
default per-100 g figure. Only what the store can know is judged: a day with
nothing recorded yet is the state "no record today" (no owed, no-fluid or
weight-missing alarm), and while a session runs the water is not final
("session running": no owed or no-fluid alarm). Alerts (kind, level, one
sentence): supplement owed (a "notice" before the end-of-day time, an
"alert" from then on), no fluid for `no_fluid_hours` since the last fluid on
record, weight missing (none within `weigh_every_days`), weight
below the warning and limit levels (strictly below; defaults 85 % and 80 % of
baseline, common practice per docs/care.md), valves open too long, deliveries
with no lick. Thresholds are the institution's to set; the figures are
advisory and the approved protocol and the veterinarian decide. Pure:
records in, summaries and care-sheet rows out.
"""

from __future__ import annotations

import re
from dataclasses import dataclass, field
from datetime import date, datetime, time, timedelta
from typing import Any, Sequence

from drivers.config import ConfigError, TomlFile
from monitor.core.care.water import SessionWater

NOTICE, WARNING, ALERT = "notice", "warning", "alert"
RECORDED, NO_RECORD, RUNNING = "recorded", "no record today", "session running"
_HHMM = re.compile(r"^([01]\d|2[0-3]):([0-5]\d)$")


@dataclass(frozen=True, slots=True)
class CareConfig:
    """An institution's thresholds (defaults and their sources: docs/care.md)."""

    daily_minimum_ml: float | None = 1.0
    daily_minimum_ml_per_kg: float | None = None
    daily_minimum_ml_per_100g: float | None = 4.0    # any species without its own figure (the mouse figure)
    species_ml_per_100g: tuple[tuple[str, float], ...] = (("mouse", 4.0),)   # [care.species]: name = ml/100 g
    end_of_day: time = time(17, 0)
    no_fluid_hours: float = 20.0
    weight_warning_percent: float = 85.0
    weight_limit_percent: float = 80.0
    weigh_every_days: int = 1
    max_valve_ms: float = 250.0
    lick_window_ms: float = 2000.0


_NUMBERS = {"daily_minimum_ml", "daily_minimum_ml_per_kg", "daily_minimum_ml_per_100g", "no_fluid_hours", "weight_warning_percent",
            "weight_limit_percent", "max_valve_ms", "lick_window_ms"}
_KEYS = _NUMBERS | {"end_of_day", "weigh_every_days", "species"}
_FIXED_RULES = ("daily_minimum_ml", "daily_minimum_ml_per_kg")
SPECIES_WORDS = {"mouse": ("mouse", "mice", "mus musculus"), "rat": ("rat", "rats", "rattus")}


def parse_care(table: dict[str, Any], doc: TomlFile | None = None) -> CareConfig:
    """A `[care]` table as a CareConfig (missing keys keep their defaults); ConfigError names file/line/key."""

    def error(key: str, message: str) -> ConfigError:
        return doc.error("care", key, message) if doc else ConfigError("<care>", None, f"[care] {key}", message)

    values: dict[str, Any] = {}
    for key, value in table.items():
        if key not in _KEYS:
            raise error(key, f"unknown key (expected one of: {', '.join(sorted(_KEYS))})")
        if key in _NUMBERS:
            if isinstance(value, bool) or not isinstance(value, (int, float)) or not value > 0:
                raise error(key, f"expected a number > 0, got {value!r}")
            if key.endswith("_percent") and value > 100:
                raise error(key, "a percent of baseline must be at most 100")
            values[key] = float(value)
        elif key == "species":
            if not isinstance(value, dict):
                raise error(key, "expected a table of species = ml per 100 g body weight per day")
            for name, figure in value.items():
                if isinstance(figure, bool) or not isinstance(figure, (int, float)) or not figure > 0:
                    raise error(key, f"{name}: expected ml per 100 g per day > 0, got {figure!r}")
            species = dict(CareConfig().species_ml_per_100g)
            species.update({str(n).strip().lower(): float(f) for n, f in value.items()})
            values[key] = tuple(species.items())
        elif key == "weigh_every_days":
            if isinstance(value, bool) or not isinstance(value, int) or value < 1:
                raise error(key, f"expected a whole number >= 1, got {value!r}")
            values[key] = value
        else:
            found = _HHMM.match(value) if isinstance(value, str) else None
            if not found:
                raise error(key, f"expected a local time \"HH:MM\", got {value!r}")
            values[key] = time(int(found.group(1)), int(found.group(2)))
    if "daily_minimum_ml_per_kg" in values:
        values.setdefault("daily_minimum_ml", None)  # per-kg alone replaces the fixed default
    if any(k in values for k in _FIXED_RULES):   # a lab's own rule replaces the per-100 g default
        values.setdefault("daily_minimum_ml_per_100g", None)
    if "species" in values:
        values["species_ml_per_100g"] = values.pop("species")
    config = CareConfig(**values)
    if config.weight_limit_percent >= config.weight_warning_percent:
        raise error("weight_limit_percent", "must be below weight_warning_percent")
    return config


def _aware(name: str, moment: datetime) -> datetime:
    if moment.tzinfo is None:
        raise ValueError(f"{name} needs a UTC offset")
    return moment


@dataclass(frozen=True, slots=True)
class Supplement:
    time: datetime
    ml: float
    by: str
    note: str = ""

    def __post_init__(self) -> None:
        _aware("supplement time", self.time)
        if not self.ml >= 0:
            raise ValueError("a supplement is a volume >= 0 ml")


@dataclass(frozen=True, slots=True)
class Weighing:
    time: datetime
    grams: float
    by: str

    def __post_init__(self) -> None:
        _aware("weighing time", self.time)
        if not self.grams > 0:
            raise ValueError("a body weight is > 0 g")


@dataclass(frozen=True, slots=True)
class HealthNote:
    time: datetime
    by: str
    text: str


@dataclass(frozen=True, slots=True)
class AnimalCare:
    """Everything recorded about one animal's care (any span of days)."""

    animal: str
    baseline_g: float | None
    sessions: tuple[SessionWater, ...] = ()
    supplements: tuple[Supplement, ...] = ()
    weighings: tuple[Weighing, ...] = ()
    notes: tuple[HealthNote, ...] = ()
    species: str | None = None          # from the animal's record


@dataclass(frozen=True, slots=True)
class CareAlert:
    kind: str
    level: str  # NOTICE | WARNING | ALERT
    message: str


@dataclass(frozen=True, slots=True)
class DaySummary:
    """One animal's care day."""

    animal: str
    day: date
    sessions: int
    deliveries: int
    earned_ml: float
    supplement_ml: float
    total_ml: float
    minimum_ml: float | None
    owed_ml: float | None
    weight_g: float | None
    weighed_on: date | None
    baseline_g: float | None
    percent_of_baseline: float | None
    last_fluid: datetime | None
    supplements_by: tuple[str, ...]
    notes: tuple[str, ...]
    alerts: tuple[CareAlert, ...] = field(default=())
    state: str = "recorded"             # RECORDED | NO_RECORD | RUNNING: what the day's figures can say
    minimum_rule: str = ""              # how the minimum was set, in words

    def row(self) -> dict[str, Any]:
        """One care-sheet row, keyed by CARE_SHEET_COLUMNS (plain values for CSV)."""
        return {
            "animal": self.animal, "date": self.day.isoformat(), "sessions": self.sessions,
            "deliveries": self.deliveries, "earned_ml": round(self.earned_ml, 3),
            "supplement_ml": round(self.supplement_ml, 3), "total_ml": round(self.total_ml, 3),
            "minimum_ml": _round(self.minimum_ml, 3), "owed_ml": _round(self.owed_ml, 3),
            "weight_g": _round(self.weight_g, 1), "weighed_on": self.weighed_on.isoformat() if self.weighed_on else "",
            "baseline_g": _round(self.baseline_g, 1), "percent_of_baseline": _round(self.percent_of_baseline, 1),
            "last_fluid": self.last_fluid.isoformat() if self.last_fluid else "",
            "supplements_by": "; ".join(self.supplements_by), "notes": "; ".join(self.notes),
            "alerts": "; ".join(f"{a.level}: {a.message}" for a in self.alerts),
        }


CARE_SHEET_COLUMNS = ("animal", "date", "sessions", "deliveries", "earned_ml", "supplement_ml", "total_ml",
                      "minimum_ml", "owed_ml", "weight_g", "weighed_on", "baseline_g", "percent_of_baseline",
                      "last_fluid", "supplements_by", "notes", "alerts")


def _round(value: float | None, digits: int) -> float | str:
    return "" if value is None else round(value, digits)


def percent_of_baseline(weight_g: float, baseline_g: float) -> float:
    return 100.0 * weight_g / baseline_g


def species_figure(config: CareConfig, species: str | None) -> tuple[str, float] | None:
    """(name, ml per 100 g per day) of the lab's figure for `species` (its common or Latin name), or None."""
    if not species:
        return None
    text = species.strip().lower()
    for name, figure in config.species_ml_per_100g:
        words = SPECIES_WORDS.get(name, (name,))
        if any(text == w or text.startswith(w + " ") for w in words):
            return name, figure
    return None


def per_100g(config: CareConfig, species: str | None) -> tuple[float | None, str]:
    """The per-100 g figure in force for `species` and its source, in words."""
    found = species_figure(config, species)
    if found is not None:
        return found[1], f"{found[1]:g} ml per 100 g body weight ({found[0]} figure)"
    if config.daily_minimum_ml_per_100g is None:
        return None, ""
    whose = "species not recorded" if not species else f"no figure set for {species}"
    return config.daily_minimum_ml_per_100g, f"{config.daily_minimum_ml_per_100g:g} ml per 100 g body weight " \
                                             f"(default; {whose})"


def daily_minimum_ml(config: CareConfig, weight_g: float | None, species: str | None = None) -> float | None:
    """The day's minimum in ml: the larger of the fixed, per-kg and per-100 g minimums that can be computed."""
    return _minimum(config, weight_g, species)[0]


def _minimum(config: CareConfig, weight_g: float | None, species: str | None) -> tuple[float | None, str]:
    candidates: list[tuple[float, str]] = []
    if config.daily_minimum_ml is not None:
        candidates.append((config.daily_minimum_ml, f"{config.daily_minimum_ml:g} ml/day"))
    if config.daily_minimum_ml_per_kg is not None and weight_g is not None:
        candidates.append((config.daily_minimum_ml_per_kg * weight_g / 1000.0,
                           f"{config.daily_minimum_ml_per_kg:g} ml/kg/day"))
    figure, words = per_100g(config, species)
    if figure is not None and weight_g is not None:
        candidates.append((figure * weight_g / 100.0, words))
    if not candidates:
        return None, ""
    return max(candidates)


def day_summary(care: AnimalCare, day: date, config: CareConfig, now: datetime) -> DaySummary:
    """The care day `day` of one animal, judged at `now` (aware)."""
    _aware("now", now)
    day_end = datetime.combine(day + timedelta(days=1), time(0), tzinfo=now.tzinfo)
    as_of = min(now, day_end)
    sessions = [s for s in care.sessions if s.end is not None and s.end.date() == day]
    supplements = [s for s in care.supplements if s.time.date() == day]
    earned = sum(s.earned_ml for s in sessions)
    given = sum(s.ml for s in supplements)
    total = earned + given
    weighings = sorted((w for w in care.weighings if w.time.date() <= day), key=lambda w: w.time)
    latest = weighings[-1] if weighings else None
    weight = latest.grams if latest else None
    minimum, rule = _minimum(config, weight if weight is not None else care.baseline_g, care.species)
    running = [s for s in care.sessions if s.end is None and s.start is not None and s.start.date() == day]
    recorded = bool(sessions or running or supplements or any(w.time.date() == day for w in care.weighings)
                    or any(n.time.date() == day for n in care.notes))
    state = RUNNING if running else RECORDED if recorded else NO_RECORD
    owed = None if minimum is None else max(0.0, minimum - total)
    percent = None if latest is None or not care.baseline_g else percent_of_baseline(latest.grams, care.baseline_g)
    fluid_times = [s.end for s in care.sessions if s.end is not None and s.earned_ul > 0 and s.end <= as_of]
    fluid_times += [s.time for s in care.supplements if s.ml > 0 and s.time <= as_of]
    last_fluid = max(fluid_times) if fluid_times else None
    alerts: list[CareAlert] = []
    past_end_of_day = as_of.timetz().replace(tzinfo=None) >= config.end_of_day or as_of == day_end
    if state == NO_RECORD:      # what the store cannot know yet is not an alarm: one plain state instead
        alerts.append(CareAlert("no_record_today", WARNING if past_end_of_day else NOTICE,
                                "Nothing recorded today yet (no session, weighing or supplement)."))
    elif state == RUNNING:
        alerts.append(CareAlert("session_running", NOTICE, "A session is running: today's water is counted "
                                                           "when it ends."))
    if minimum is None:
        alerts.append(CareAlert("minimum_unknown", WARNING,
                                "No daily minimum can be computed: record a weight or set daily_minimum_ml."))
    elif state == RECORDED and owed and owed > 0:
        level = ALERT if past_end_of_day else NOTICE
        due = "was due" if past_end_of_day else "is due"
        alerts.append(CareAlert("supplement_owed", level,
                                f"Supplement of {owed:.2f} ml owed (total {total:.2f} of {minimum:.2f} ml); "
                                f"it {due} by {config.end_of_day:%H:%M}."))
    if state == RECORDED and last_fluid is not None and as_of - last_fluid >= timedelta(hours=config.no_fluid_hours):
        since = f"last fluid {(as_of - last_fluid).total_seconds() / 3600:.1f} h ago"
        alerts.append(CareAlert("no_fluid", ALERT, f"No fluid for {config.no_fluid_hours:g} h or more ({since})."))
    if state != NO_RECORD and (latest is None or (day - latest.time.date()).days >= config.weigh_every_days):
        alerts.append(CareAlert("weight_missing", ALERT if past_end_of_day else NOTICE,
                                "No body weight recorded today." if config.weigh_every_days == 1 else
                                f"No body weight recorded in the last {config.weigh_every_days} days."))
    if care.baseline_g is None:
        alerts.append(CareAlert("no_baseline", WARNING, "No baseline weight: percent of baseline unknown."))
    if percent is not None:
        if percent < config.weight_limit_percent:
            alerts.append(CareAlert("weight_limit", ALERT,
                                    f"Weight {latest.grams:g} g is {percent:.1f} % of baseline, below the "
                                    f"{config.weight_limit_percent:g} % limit: act now and inform the veterinarian."))
        elif percent < config.weight_warning_percent:
            alerts.append(CareAlert("weight_warning", WARNING,
                                    f"Weight {latest.grams:g} g is {percent:.1f} % of baseline, below the "
                                    f"{config.weight_warning_percent:g} % warning level."))
    for s in sessions:
        name = f"session {s.session}" if s.session else "a session"
        if s.long_valves_ms:
            alerts.append(CareAlert("valve_too_long", ALERT,
                                    f"Valve open {max(s.long_valves_ms):g} ms in {name} (limit {config.max_valve_ms:g} "
                                    f"ms, {len(s.long_valves_ms)} time(s)): check the valve and the water given."))
        if s.deliveries and s.licks == 0:
            alerts.append(CareAlert("no_licks", WARNING, f"No licks at all for {s.deliveries} deliveries in {name}: "
                                                         "check the spout and the lick sensor."))
        elif s.unconfirmed:
            alerts.append(CareAlert("unlicked_rewards", NOTICE,
                                    f"{s.unconfirmed} of {s.deliveries} deliveries in {name} had no lick within "
                                    f"{config.lick_window_ms / 1000:g} s."))
        if s.unknown_volume:
            alerts.append(CareAlert("unknown_volume", WARNING,
                                    f"{s.unknown_volume} deliveries in {name} have no known volume "
                                    "(set the reward size or the valve calibration)."))
    return DaySummary(
        care.animal, day, len(sessions), sum(s.deliveries for s in sessions), earned, given, total, minimum,
        owed, weight, latest.time.date() if latest else None, care.baseline_g, percent, last_fluid,
        tuple(sorted({s.by for s in supplements})),
        tuple(n.text for n in sorted(care.notes, key=lambda n: n.time) if n.time.date() == day),
        tuple(alerts), state, rule)


def care_sheet(cohort: Sequence[AnimalCare], day: date, config: CareConfig, now: datetime) -> tuple[DaySummary, ...]:
    """The cohort's care day, one summary per animal in name order (rows via `.row()`)."""
    return tuple(day_summary(care, day, config, now) for care in sorted(cohort, key=lambda c: c.animal))
