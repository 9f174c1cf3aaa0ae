"""Checks of what a person typed into a dialog, as pure functions (no Qt).

Rule: each check returns a list of problems, each one sentence that names the
field and says what to fix; an empty list means the input is accepted. Dialogs
refuse to close while there are problems and show them. Checks never touch a
device or a file themselves: whether a path exists is asked through the
`exists` callable the caller passes in.
"""

from __future__ import annotations

import math
import re
from typing import Callable

from monitor.ui.models import RigSetup, Roster

RIG_NAME = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_.-]{0,31}$")
WEIGHT_RANGE_G = (5.0, 1000.0)          # a mouse to a large rat (common practice)
VALVE_RANGE_UL_PER_MS = (0.001, 10.0)   # small solenoid valves deliver ~0.01–1 µL/ms (from memory)


def check_in_problems(roster: Roster, animal: str, rig: str, operator: str, weight_g: float, stage: str) -> list[str]:
    """Problems with a check-in (animal in a box), empty when it can be recorded."""
    problems = []
    if not animal.strip():
        problems.append("Animal: choose which animal goes into the box.")
    elif roster.animals and animal not in roster.animals:
        problems.append(f"Animal: {animal!r} is not in this cohort; add it as a new animal first or pick one from the list.")
    if not rig.strip():
        problems.append("Box: choose the box the animal is in.")
    elif roster.rigs and rig not in roster.rigs:
        problems.append(f"Box: {rig!r} is not set up on this PC.")
    elif rig in roster.occupied and roster.occupied[rig] != animal:
        problems.append(f"Box: {rig} still has {roster.occupied[rig]} checked in; check it out first.")
    if animal in roster.occupied.values():
        where = next(r for r, a in roster.occupied.items() if a == animal)
        if where != rig:
            problems.append(f"Animal: {animal} is already checked in at {where}; check it out there first.")
    if not operator.strip():
        problems.append("Operator: type your name.")
    if not math.isfinite(weight_g) or not WEIGHT_RANGE_G[0] <= weight_g <= WEIGHT_RANGE_G[1]:
        problems.append(f"Weight: enter today's weight in grams ({WEIGHT_RANGE_G[0]:.0f}–{WEIGHT_RANGE_G[1]:.0f} g).")
    if not stage.strip():
        problems.append("Stage: choose the training stage for this session.")
    elif roster.stages and stage not in roster.stages:
        problems.append(f"Stage: {stage!r} is not a stage of the protocol.")
    return problems


def unusual_box_warning(roster: Roster, animal: str, rig: str) -> str:
    """A warning sentence when `animal` is not usually trained in `rig`, else ''."""
    usual = roster.usual_rigs.get(animal)
    if not usual or not rig or rig in usual:
        return ""
    return f"{animal} is usually in {', '.join(usual)}, not {rig}. Check the box before starting."


def exclusion_problems(reason: str, undo: bool = False) -> list[str]:
    if reason.strip():
        return []
    return ["Reason: say why this session counts again."] if undo else \
        ["Reason: say why this session is kept out of curves and fits."]


def gift_problems(rig: str, presses: int, animal: str, operator: str, reason: str) -> list[str]:
    """What stops giving a box's unattended presses to an animal (empty when nothing)."""
    problems = []
    if not rig or presses <= 0:
        problems.append("Box: choose a box that ran with nobody checked in.")
    if not animal.strip():
        problems.append("Animal: name the animal that was in the box.")
    if not operator.strip():
        problems.append("Operator: type your name.")
    if not reason.strip():
        problems.append("Reason: say how you know it was this animal.")
    return problems


def condition_problems(what: str, dose: str, volume_ul: float | None) -> list[str]:
    problems = []
    if not what.strip():
        problems.append("What: name the condition or manipulation (e.g. muscimol, saline, lesion).")
    if volume_ul is not None and (not math.isfinite(volume_ul) or volume_ul < 0):
        problems.append("Volume: enter a volume of 0 µL or more, or leave it empty.")
    if len(dose) > 80:
        problems.append("Dose: keep it under 80 characters (e.g. 0.5 mg/kg).")
    return problems


def rig_setup_problems(setup: RigSetup, existing: set[str] | frozenset[str] = frozenset(),
                       exists: Callable[[str], bool] = lambda path: True) -> list[str]:
    """Problems with a new rig's settings; `existing` holds the rig names already set up."""
    problems = []
    if not RIG_NAME.match(setup.name):
        problems.append("Name: use 1–32 letters, digits, '-', '_' or '.', starting with a letter or digit "
                        "(e.g. box-05).")
    elif setup.name in existing:
        problems.append(f"Name: a rig called {setup.name!r} already exists; pick another name.")
    if setup.source not in ("serial", "file"):
        problems.append("Source: choose a serial device or a log file.")
    elif not setup.path.strip():
        problems.append("Source: choose a serial device from the list or a log file path."
                        if setup.source == "serial" else "Source: choose the log file the rig writes.")
    elif setup.source == "file" and not exists(setup.path):
        problems.append(f"Source: the file {setup.path} does not exist; check the path, or start the "
                        "rig's acquisition first so that it creates the file.")
    if setup.mapping_path and not exists(setup.mapping_path):
        problems.append(f"Mapping: {setup.mapping_path} does not exist; choose the mapping file or leave it empty.")
    if setup.valve_ul_per_ms is not None:
        lo, hi = VALVE_RANGE_UL_PER_MS
        if not math.isfinite(setup.valve_ul_per_ms) or not lo <= setup.valve_ul_per_ms <= hi:
            problems.append(f"Valve calibration: enter µL delivered per ms of valve opening, between {lo} and {hi}; "
                            "measure it by weighing 100 openings.")
    if not setup.protocol_path.strip():
        problems.append("Protocol: choose the training protocol file for this rig.")
    elif not exists(setup.protocol_path):
        problems.append(f"Protocol: {setup.protocol_path} does not exist; choose an existing protocol file.")
    return problems
