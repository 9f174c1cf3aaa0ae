"""The simulator's own scenario: cohort "orchard-26a", its animals, boxes, protocols and week.

Rule: everything here is invented for demos and tests. Rats named after
trees train on the two-press task in four boxes, in shifts, Monday to Friday
(no sessions at weekends), in a lab at UTC+01:00. Odd-numbered animals work
towards 650 ms, even-numbered ones towards 800 ms, through three shaping
stages: a wide fixed window, an adaptive window holding half the trials
rewarded, and the final fixed ±20 % window.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import date, datetime, time, timedelta, timezone

from mock_rig.learner import LearnerParams
from mock_rig.tasks import JOYSTICK_HOLD, TWO_PRESS, ScenarioProtocol, Stage

COHORT = "orchard-26a"
LAB_TZ = timezone(timedelta(hours=1))
FIRST_DAY = date(2026, 2, 2)  # a Monday
TREES = (
    "alder", "birch", "cedar", "damson", "elder", "fir", "gorse", "hazel",
    "ilex", "juniper", "larch", "maple", "nutmeg", "olive", "poplar", "rowan",
)
BOXES = ("box1", "box2", "box3", "box4")
SHIFTS = (time(9, 0), time(10, 10), time(11, 20), time(13, 30))
SESSION_DAYS = frozenset(range(5))  # Monday..Friday
PREMATURE_MS = 120.0  # a second press this soon is a double tap, not a timed interval


def animal_names(count: int) -> list[str]:
    """`count` animal names: trees, then trees with a number."""
    return [
        TREES[i % len(TREES)] + ("" if i < len(TREES) else str(i // len(TREES) + 1))
        for i in range(count)
    ]


def two_press_protocol(target_ms: int) -> ScenarioProtocol:
    """The cohort's two-press protocol for a final target of `target_ms`."""
    return ScenarioProtocol(
        name=f"two-press {target_ms} ms",
        task=TWO_PRESS,
        stages=(
            Stage("wide", target_ms=round(target_ms * 0.55), tolerance=0.5,
                  premature_ms=PREMATURE_MS, advance_min_hit_rate=0.6),
            Stage("adaptive", target_ms=round(target_ms * 0.8), tolerance=0.3,
                  adaptive_rate=0.5, tolerance_min=0.15, tolerance_max=0.4,
                  premature_ms=PREMATURE_MS, advance_min_hit_rate=0.45, advance_min_trials=300),
            Stage("final", target_ms=target_ms, tolerance=0.2, premature_ms=PREMATURE_MS),
        ),
    )


def joystick_protocol(hold_ms: int = 700) -> ScenarioProtocol:
    """A joystick hold protocol: push past 15 degrees and hold for `hold_ms`."""
    return ScenarioProtocol(
        name=f"joystick hold {hold_ms} ms",
        task=JOYSTICK_HOLD,
        stages=(
            Stage("short", target_ms=round(hold_ms * 0.5), tolerance=0.5),
            Stage("final", target_ms=hold_ms, tolerance=0.25),
        ),
    )


@dataclass(frozen=True)
class Placement:
    """Where and when an animal trains."""

    box: str
    shift: time


def placement(index: int) -> Placement:
    """Box and shift of the animal at `index` in the cohort."""
    return Placement(BOXES[index % len(BOXES)], SHIFTS[(index // len(BOXES)) % len(SHIFTS)])


def target_for(index: int) -> int:
    return 650 if index % 2 == 0 else 800


def session_days(first: date, days: int) -> list[date]:
    """Training days among `days` calendar days from `first` (weekdays only)."""
    return [d for d in (first + timedelta(n) for n in range(days)) if d.weekday() in SESSION_DAYS]


def session_start(day: date, shift: time, jitter_min: float) -> datetime:
    """Wall-clock start of a session (the shift's time, give or take a few minutes)."""
    return datetime.combine(day, shift, LAB_TZ) + timedelta(minutes=jitter_min)


def variant_params(
    drive: str = "error", warmup: bool = False, satiety: bool = False, narrowing: bool = False
) -> LearnerParams:
    """Cohort base parameters with the chosen variants switched on."""
    params = LearnerParams(drive=drive)
    if warmup:
        params = params.with_(warmup_offset=-0.3)  # shorter intervals on the first trials
    if satiety:
        params = params.with_(satiety_rewards=180.0)
    if narrowing:
        params = params.with_(sigma_naive=0.45)
    return params
