"""Weeks of training history in seconds: session files, protocol files and the truth.

Rule: each simulated animal trains on its weekday schedule; each session is one
`NAME_sNN.rsw` file in wire format, beginning with the board's boot header
(`start=` the session's wall-clock start). Between sessions the learner forgets
according to the break's length in hours. `truth.json` records, per session,
what the box decided (`trials` = completed trials, hit or miss; `hits` =
rewarded trials) and the learner's latent state after the session's last
trial: `fast` = |x_fast| and `slow` = |x_slow|, the magnitudes of the learned
change in log(interval / naive interval) carried by each state, and
`consolidation` = slow / (fast + slow), in [0, 1]. Stages advance between
sessions when a session meets the stage's criterion. On request, a
`NAME.trials.csv` per animal gives the latent states trial by trial.
`animals.sh` holds one `rigside animal add` line per animal with its subject
record (SUBJECT: species, sex, date of birth, strain, genotype, ...), to run
with the database as its argument. Every file is written under a temporary
name and renamed when whole, so an interrupted run leaves whole session files
and no truth file (written last).
"""

from __future__ import annotations

import json
import math
import shlex
from dataclasses import dataclass, field
import os
from collections.abc import Callable
from datetime import date, datetime, timedelta
from pathlib import Path

import numpy as np

from mock_rig import scenario
from mock_rig.learner import Learner, LearnerParams, consolidation_fraction, draw_params
from mock_rig.protocol_file import protocol_toml
from mock_rig.rig import Board, BoardConfig
from mock_rig.tasks import JOYSTICK_HOLD, TWO_PRESS, ScenarioProtocol, Session


@dataclass
class Animal:
    """A simulated subject: learner, protocol, stage, board and schedule."""

    name: str
    protocol: ScenarioProtocol
    learner: Learner
    rng: np.random.Generator
    board: BoardConfig = field(default_factory=BoardConfig)
    shift: scenario.time = scenario.SHIFTS[0]
    stage_index: int = 0
    last_end: datetime | None = None
    sessions: list[dict] = field(default_factory=list)

    def break_hours(self, start: datetime) -> float | None:
        if self.last_end is None:
            return None
        return (start - self.last_end).total_seconds() / 3600.0

    def open_session(
        self, wall_start: datetime, break_hours: float | None = None
    ) -> tuple[Session, Board, bytes]:
        """Start a session at `wall_start`: forgetting over the break, boot header.

        `break_hours` overrides the break measured from the last session's end
        (live rigs replay "the next day" at once).
        """
        hours = self.break_hours(wall_start) if break_hours is None else break_hours
        self.learner.start_session(hours)
        session = Session(self.protocol, self.stage_index, self.learner, self.rng)
        board = Board(self.board, wall_start)
        return session, board, board.boot(0)

    def close_session(self, session: Session, board: Board, file_name: str | None) -> dict:
        """Record the session's truth and advance the stage if its criterion is met."""
        learner, counts = self.learner, session.counts
        record = {
            "index": len(self.sessions) + 1,
            "file": file_name,
            "start": board.wall0.isoformat(timespec="seconds"),
            "stage": session.stage.name,
            "stage_number": session.stage_index + 1,
            "target_ms": session.stage.target_ms,
            "trials": counts.trials,
            "hits": counts.hits,
            "fast": abs(learner.x_fast),
            "slow": abs(learner.x_slow),
            "consolidation": consolidation_fraction(learner.x_fast, learner.x_slow),
            "x_fast": learner.x_fast,
            "x_slow": learner.x_slow,
            "misses": counts.misses,
            "premature": counts.premature,
            "inter_trial_presses": counts.inter_trial,
            "lone": counts.lone,
            "omissions": counts.omissions,
            "water_ul": counts.water_ul,
            "practice_trials": learner.practice,
        }
        self.sessions.append(record)
        self.last_end = board.wall(session.now)
        stage = session.stage
        if (
            self.stage_index < len(self.protocol.stages) - 1
            and counts.trials >= stage.advance_min_trials
            and counts.hit_rate >= stage.advance_min_hit_rate
        ):
            self.stage_index += 1
        return record


def run_session(
    animal: Animal, wall_start: datetime, record_latents: bool = False
) -> tuple[bytes, Session, Board]:
    """A whole session's bytes, produced as fast as possible."""
    session, board, header = animal.open_session(wall_start)
    if record_latents:
        session.latents = []
    parts = [header]
    encode = board.encode
    while (chunk := session.next_chunk()) is not None:
        for t, name, args in chunk:
            line = encode(t, name, args)
            if line is not None:
                parts.append(line)
    return b"".join(parts), session, board


def cohort(
    count: int,
    seed: int,
    base: LearnerParams | None = None,
    legacy: bool = False,
    task: str = TWO_PRESS,
) -> list[Animal]:
    """`count` animals of the scenario cohort, each with its own parameters and generator.

    The joystick cohort holds for 700 ms (naive holds ~200 ms) on firmware holdstick-v1.
    """
    animals = []
    for index, name in enumerate(scenario.animal_names(count)):
        rng = np.random.default_rng([seed, index])
        place = scenario.placement(index)
        if task == JOYSTICK_HOLD:
            params = draw_params(rng, (base or LearnerParams()).with_(naive_ms=200.0))
            protocol, fw = scenario.joystick_protocol(700), "holdstick-v1"
        else:
            params = draw_params(rng, base)
            protocol, fw = scenario.two_press_protocol(scenario.target_for(index)), "presspair-v2"
        animals.append(
            Animal(
                name=name,
                protocol=protocol,
                learner=Learner(params, rng),
                rng=rng,
                board=BoardConfig(fw=fw, legacy=legacy, rig_name=place.box),
                shift=place.shift,
            )
        )
    return animals


TRIAL_COLUMNS = "session,trial,t_us,target_ms,interval_ms,hit,y,error,x_fast,x_slow"


def write_whole(path: Path, data: bytes) -> None:
    """Write `data` to `path` under a temporary name, renamed when whole."""
    part = path.with_name(f".{path.name}.part")
    try:
        part.write_bytes(data)
        os.replace(part, path)
    finally:
        part.unlink(missing_ok=True)


def train(animal: Animal, days: list[date], out: Path | None, trial_truth: bool = False,
          written: Callable[[str], None] | None = None) -> None:
    """Run `animal` through a session on each day; write its files into `out`.

    With `trial_truth`, also `NAME.trials.csv`: one row per completed trial with
    the learner's output and states after the update (TRIAL_COLUMNS; `t_us` is
    simulated µs since the session's boot, `y` is log(interval / naive_ms)). `written(name)` follows
    each session file.
    """
    rows: list[str] = []
    for day in days:
        start = scenario.session_start(day, animal.shift, float(animal.rng.uniform(-10, 10)))
        data, session, board = run_session(animal, start, record_latents=trial_truth)
        name = f"{animal.name}_s{len(animal.sessions) + 1:02d}.rsw"
        if out is not None:
            write_whole(out / name, data)
            if written is not None:
                written(name)
        record = animal.close_session(session, board, name)
        naive = animal.learner.params.naive_ms
        for number, (t, target, hit, z) in enumerate(session.latents or (), start=1):
            rows.append(f"{record['index']},{number},{t},{target:g},{naive * math.exp(z.y):.3f},"
                        f"{int(hit)},{z.y:.6f},{z.error:.6f},{z.x_fast:.6f},{z.x_slow:.6f}")
    if trial_truth and out is not None:
        (out / f"{animal.name}.trials.csv").write_text("\n".join([TRIAL_COLUMNS, *rows]) + "\n")


def write_history(
    out: Path,
    animals: list[Animal],
    days: int,
    first_day: date = scenario.FIRST_DAY,
    trial_truth: bool = False,
    written: Callable[[str], None] | None = None,
) -> dict:
    """Write every animal's sessions, protocol file and the truth file; return the truth.

    `written(name)` follows each session file (a progress count)."""
    out.mkdir(parents=True, exist_ok=True)
    session_days = scenario.session_days(first_day, days)
    for animal in animals:
        train(animal, session_days, out, trial_truth, written)
        write_whole(out / f"{animal.name}.protocol.toml", protocol_toml(animal.protocol).encode())
    write_whole(out / "animals.sh", animals_script(animals, first_day).encode())
    truth = truth_document(animals)
    write_whole(out / "truth.json", json.dumps(truth, indent=1).encode())
    return truth


SUBJECT = {"species": "Rattus norvegicus", "strain": "Long-Evans", "genotype": "wild type",
           "supplier": "in-house colony"}
BIRTH_DAYS_BEFORE = 70  # the cohort was born this many days before the first training day (plus the animal's index)
BASELINE_G = (335.0, 410.0)  # baseline weights of females and males before water restriction, g


def subject_record(index: int, name: str, first_day: date = scenario.FIRST_DAY) -> dict:
    """The subject record of the cohort's `index`-th animal (options of `rigside animal add`)."""
    sex = "F" if index % 2 == 0 else "M"
    born = first_day - timedelta(days=BIRTH_DAYS_BEFORE + index)
    return {"name": name, "lab-id": f"R{index + 1:03d}", "cohort": scenario.COHORT, **SUBJECT, "sex": sex,
            "date-of-birth": born.isoformat(), "baseline-weight-g": f"{BASELINE_G[index % 2]:g}",
            "baseline-weight-date": (first_day - timedelta(days=7)).isoformat()}


def animals_script(animals: list[Animal], first_day: date = scenario.FIRST_DAY) -> str:
    """`animals.sh`: one `rigside animal add` line per animal; run it as `sh animals.sh DB`."""
    lines = ["#!/bin/sh", "# the cohort's subject records: sh animals.sh DATABASE", 'DB="${1:?give the database}"']
    for index, animal in enumerate(animals):
        record = subject_record(index, animal.name, first_day)
        options = " ".join(f"--{k} {shlex.quote(v)}" for k, v in record.items() if k != "name")
        lines.append(f'rigside animal add {shlex.quote(animal.name)} {options} --db "$DB"')
    return "\n".join(lines) + "\n"


def truth_document(animals: list[Animal]) -> dict:
    """The truth file's content for `animals`."""
    return {
        "cohort": scenario.COHORT,
        "definitions": {
            "trials": "completed trials (outcome hit or miss, as the box decided)",
            "hits": "rewarded trials (outcome hit)",
            "fast": "|x_fast| after the session's last trial, log(interval/naive) units",
            "slow": "|x_slow| after the session's last trial, log(interval/naive) units",
            "consolidation": "slow / (fast + slow), 0 before any learning",
        },
        "animals": {
            a.name: {
                "protocol": a.protocol.name,
                "naive_ms": a.learner.params.naive_ms,
                "params": {k: v for k, v in vars(a.learner.params).items()},
                "sessions": a.sessions,
            }
            for a in animals
        },
    }
