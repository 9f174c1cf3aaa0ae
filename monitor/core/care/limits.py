"""Plausibility of care records: what an animal of a species can weigh or be given.

Rule: a weighing or a supplement is judged against its species' limits before
it is stored. Outside the hard range (no animal of that species weighs that, no
single supplement is that large) it is refused; outside the usual range, or a
weighing far from the animal's last one (a ratio outside `change_ratio` within
`change_days`, e.g. 2,500 g after 250 g), it is stored only when a person
confirms it with a reason. A species is matched by its common or Latin name;
unknown species get broad rodent limits. A protocol's `[care_limits]` table
narrows the usual ranges for its animals (`with_protocol`). The figures are plausibility bounds,
not welfare thresholds: the approved protocol and the veterinarian set those.
Pure: numbers in, concerns out.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import datetime
from typing import NamedTuple


@dataclass(frozen=True, slots=True)
class CareLimits:
    """One species' bounds (g, ml)."""

    species: str
    weight_g: tuple[float, float]  # outside: refused
    usual_weight_g: tuple[float, float]  # outside: asks for a confirmation
    supplement_ml: float  # above: refused
    usual_supplement_ml: float  # above: asks
    change_ratio: tuple[float, float] = (0.75, 1.33)  # new / last weighing outside this: asks
    change_days: float = 14.0  # ... when the last weighing is at most this old
    usual_from: str = ""  # where the usual ranges come from, when not the species ("under this protocol")


# Adult laboratory mice weigh ~15-45 g and drink ~4-6 ml a day; rats ~150-800 g and ~25-45 ml a day
# (from memory, common laboratory animal references). Hard bounds are far beyond any real adult.
SPECIES: dict[str, CareLimits] = {
    "mouse": CareLimits("mouse", (3.0, 150.0), (10.0, 70.0), 15.0, 4.0),
    "rat": CareLimits("rat", (10.0, 1500.0), (60.0, 900.0), 60.0, 15.0),
}
RODENT = CareLimits("rodent (species not recorded)", (1.0, 2000.0), (5.0, 1000.0), 60.0, 20.0)
_NAMES = {"mouse": "mouse", "mice": "mouse", "mus musculus": "mouse", "rat": "rat", "rats": "rat",
          "rattus norvegicus": "rat", "rattus": "rat"}


class Concern(NamedTuple):
    """Why a record looks wrong; `refused` when no confirmation can make it right."""

    text: str
    refused: bool


def limits_for(species: str | None) -> CareLimits:
    """The limits of a species named in the animal's record (common or Latin name), else RODENT."""
    key = " ".join((species or "").lower().split())
    return SPECIES.get(_NAMES.get(key, ""), RODENT)


def with_protocol(limits: CareLimits, table: dict) -> CareLimits:
    """The species' limits with a protocol's `[care_limits]` usual ranges (hard bounds stay the species')."""
    usual_weight = table.get("weight_g", limits.usual_weight_g)
    usual_supplement = min(table.get("max_supplement_ml", limits.usual_supplement_ml), limits.supplement_ml)
    if not table:
        return limits
    return CareLimits(limits.species, limits.weight_g, usual_weight, limits.supplement_ml, usual_supplement,
                      limits.change_ratio, limits.change_days, " under this protocol")


def weighing_concerns(grams: float, limits: CareLimits, at: datetime,
                      last: tuple[datetime, float] | None = None) -> list[Concern]:
    """Concerns about a weighing of `grams` at `at`, given the last one (time, grams) before it."""
    low, high = limits.weight_g
    if not low <= grams <= high:
        return [Concern(f"{grams:g} g is outside {low:g}-{high:g} g: no {limits.species} weighs that", True)]
    out = []
    usual_low, usual_high = limits.usual_weight_g
    if not usual_low <= grams <= usual_high:
        out.append(Concern(f"{grams:g} g is outside the usual {usual_low:g}-{usual_high:g} g of a {limits.species}"
                           f"{limits.usual_from}",
                           False))
    if last is not None and abs((at - last[0]).total_seconds()) <= limits.change_days * 86400 and last[1] > 0:
        ratio = grams / last[1]
        if not limits.change_ratio[0] <= ratio <= limits.change_ratio[1]:
            out.append(Concern(f"{grams:g} g is {ratio:.2f} times the last weighing ({last[1]:g} g on "
                               f"{last[0].date().isoformat()})", False))
    return out


def supplement_concerns(ml: float, limits: CareLimits) -> list[Concern]:
    """Concerns about one supplement of `ml`."""
    if ml > limits.supplement_ml:
        return [Concern(f"{ml:g} ml is more than {limits.supplement_ml:g} ml: no single supplement for a "
                        f"{limits.species} is that large", True)]
    if ml > limits.usual_supplement_ml:
        return [Concern(f"{ml:g} ml is more than the usual {limits.usual_supplement_ml:g} ml for a {limits.species}"
                        f"{limits.usual_from}",
                        False)]
    return []
