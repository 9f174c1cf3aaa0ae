"""The demo cohort: four animals at four points of training, with history, ready to go live.

Rule: each demo animal has the cohort's default parameters (no spread, so its
label stays true) and a fixed number of weekday sessions of history ending
the weekday before `today`: naive (1 session), learning (8), plateaued but not
yet consolidated (20), consolidated (75). `prepare_demo` writes their session
files, protocol files and truth.json; `start_demo` puts each on its own
simulated box (a pty in a thread, or a local socket where there are no ptys)
continuing from where its history ended.
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from datetime import date, timedelta
from pathlib import Path

import numpy as np

from mock_rig import scenario
from mock_rig.history import Animal, train, truth_document
from mock_rig.learner import Learner, LearnerParams
from mock_rig.live import LiveRig, start_rigs
from mock_rig.protocol_file import protocol_toml
from mock_rig.rig import BoardConfig

STAGES = (
    ("naive", "alder", 1),
    ("learning", "birch", 8),
    ("plateaued, not consolidated", "cedar", 20),
    ("consolidated", "damson", 75),
)


@dataclass
class DemoAnimal:
    """A demo animal, its label and where its files are."""

    label: str
    animal: Animal
    protocol_path: Path
    session_files: list[Path]


def weekdays_before(today: date, count: int) -> list[date]:
    """The last `count` weekdays before `today`, oldest first."""
    days: list[date] = []
    day = today - timedelta(1)
    while len(days) < count:
        if day.weekday() in scenario.SESSION_DAYS:
            days.append(day)
        day -= timedelta(1)
    return days[::-1]


def demo_animals(
    seed: int = 7, stages: tuple[tuple[str, str, int], ...] = STAGES
) -> list[tuple[str, Animal, int]]:
    """(label, animal, sessions of history) for the demo animals."""
    out = []
    for index, (label, name, sessions) in enumerate(stages):
        rng = np.random.default_rng([seed, index])
        out.append(
            (
                label,
                Animal(
                    name=name,
                    protocol=scenario.two_press_protocol(650),
                    learner=Learner(LearnerParams(), rng),
                    rng=rng,
                    board=BoardConfig(rig_name=scenario.BOXES[index % len(scenario.BOXES)]),
                    shift=scenario.SHIFTS[0],
                ),
                sessions,
            )
        )
    return out


# an eligibility rule of our own for the demo cohort (docs/eligibility.md): two timing groups
DEMO_ELIGIBILITY = """
[eligibility]
cohort = "demo"
warn_sessions = 2

[eligibility.groups.early]
label = "plateaued, not consolidated"
max_sessions_since_plateau = 12
max_interval_error = 0.2

[eligibility.groups.late]
label = "consolidated"
min_sessions_since_plateau = 20
max_cv = 0.3
"""


def prepare_demo(
    out: Path,
    seed: int = 7,
    today: date | None = None,
    stages: tuple[tuple[str, str, int], ...] = STAGES,
) -> list[DemoAnimal]:
    """Write the demo animals' history into `out`; return them ready to go live.

    `stages` is (label, name, sessions of history) per animal (default: the four of STAGES).
    """
    out.mkdir(parents=True, exist_ok=True)
    today = today or date.today()
    prepared = []
    for label, animal, sessions in demo_animals(seed, stages):
        train(animal, weekdays_before(today, sessions), out)
        protocol_path = out / f"{animal.name}.protocol.toml"
        protocol_path.write_text(protocol_toml(animal.protocol) + DEMO_ELIGIBILITY)
        files = [out / s["file"] for s in animal.sessions]
        prepared.append(DemoAnimal(label, animal, protocol_path, files))
    truth = truth_document([d.animal for d in prepared])
    for d in prepared:
        truth["animals"][d.animal.name]["label"] = d.label
    (out / "truth.json").write_text(json.dumps(truth, indent=1))
    return prepared


def start_demo(
    prepared: list[DemoAnimal], link_dir: str | Path | None = None, speed: float = 10.0, via: str = "auto"
) -> list[LiveRig]:
    """Start one simulated box per demo animal (`via`: see `start_rigs`); stop them with `stop_rigs`."""
    return start_rigs([d.animal for d in prepared], str(link_dir) if link_dir else None,
                      speed=speed, sessions=None, via=via)
