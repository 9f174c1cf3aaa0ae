"""Faults a simulated box can suffer, on demand or on a schedule.

Rule: a fault is a kind, a start (seconds of wall-clock time after the box
starts, for schedules) and a duration in seconds. Written `KIND@START[:SECONDS]`
on the command line, e.g. `unplug@30:5`. Kinds:
unplug (cable out for SECONDS, then a re-plug: new pty, board boots),
reset (board reset: new header, counter restarts), garbage (SECONDS = number
of garbage lines, default 1), burst (output held back for SECONDS, then sent
at once), stuck_lever (lever held down for SECONDS), valve_open (valve stuck
open for SECONDS), silent (the box sends nothing for SECONDS, its counter
running on).
"""

from __future__ import annotations

from dataclasses import dataclass

KINDS = ("unplug", "reset", "garbage", "burst", "stuck_lever", "valve_open", "silent")
DEFAULT_SECONDS = {"unplug": 3.0, "reset": 0.0, "garbage": 1.0, "burst": 2.0,
                   "stuck_lever": 20.0, "valve_open": 20.0, "silent": 10.0}


@dataclass(frozen=True)
class Fault:
    """One fault: `kind` from KINDS, `at` seconds after start, lasting `seconds`."""

    kind: str
    at: float = 0.0
    seconds: float | None = None

    def __post_init__(self) -> None:
        if self.kind not in KINDS:
            raise ValueError(f"unknown fault {self.kind!r}; expected one of {', '.join(KINDS)}")

    @property
    def duration(self) -> float:
        return DEFAULT_SECONDS[self.kind] if self.seconds is None else self.seconds


def parse_fault(text: str) -> Fault:
    """`KIND@START[:SECONDS]` -> Fault; raises ValueError naming the problem."""
    kind, sep, when = text.partition("@")
    if not sep:
        raise ValueError(f"fault {text!r}: expected KIND@START[:SECONDS]")
    start, _, seconds = when.partition(":")
    try:
        at = float(start)
        length = float(seconds) if seconds else None
    except ValueError:
        raise ValueError(f"fault {text!r}: START and SECONDS must be numbers") from None
    return Fault(kind.strip(), at, length)
