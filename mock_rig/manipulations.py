"""Simulated manipulations whose effect depends on how far the animal's learning has consolidated.

Rule: a manipulation acts on the learner's two states at the start of a
session. `inactivate_fast` (acute, test): for that session the fast state
neither contributes to the output nor learns, and nothing moves from it to
the slow state, so behaviour falls back to what the slow state alone gives;
the fast state is back, unchanged, the next session. `lesion_fast` (lasting,
test): from that session on the fast state is gone (x_fast = 0, and it
neither acts nor learns again), so only the slow state's error-driven part
(`b_slow`, 0 by default) can bring performance back. `vehicle` (acute) and `sham` (lasting) are
controls that remove nothing. The less consolidated the animal (the larger
x_fast against x_slow), the larger the drop. `ManipulatedLearner` records,
per completed trial, the mean and SD of the log output it was drawn from, so
`expected_hit_rate` gives the hit rate a session's latent states predict:
the simulated truth an estimated effect is judged against. `train` and
`write_history` are history's with a plan of manipulations per animal.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, NamedTuple

from mock_rig.learner import Learner, TrialLatent

if TYPE_CHECKING:
    from mock_rig.history import Animal

ACUTE, LASTING = "acute", "lasting"
TEST, CONTROL = "test", "control"


class Kind(NamedTuple):
    """What a simulated manipulation is: acute or lasting, test or control."""

    duration: str
    role: str


KINDS: dict[str, Kind] = {
    "inactivate_fast": Kind(ACUTE, TEST),
    "vehicle": Kind(ACUTE, CONTROL),
    "lesion_fast": Kind(LASTING, TEST),
    "sham": Kind(LASTING, CONTROL),
}


@dataclass
class ManipulatedLearner(Learner):
    """A learner a manipulation can act on; records (mean, sd) of log output per completed trial."""

    fast_inactive: bool = False
    fast_lost: bool = False
    record: list[tuple[float, float]] = field(default_factory=list)

    @property
    def x(self) -> float:
        """The learned change the output carries (the slow state alone while the fast one is inactive)."""
        return self.x_slow if self.fast_inactive or self.fast_lost else self.x_fast + self.x_slow

    def learn_log(self, f: float, y: float, noise: float, rewarded: bool, clamp: bool = False) -> TrialLatent:
        self.record.append((y - noise, self.sigma_now()))
        if not (self.fast_inactive or self.fast_lost):
            return super().learn_log(f, y, noise, rewarded, clamp)
        params, fast = self.params, self.x_fast
        self.params = params.with_(b_fast=0.0, b_outcome=0.0, transfer=0.0, a_fast=1.0)
        try:
            return super().learn_log(f, y, noise, rewarded, clamp)
        finally:
            self.params, self.x_fast = params, fast

    @classmethod
    def like(cls, learner: Learner) -> "ManipulatedLearner":
        """The same animal (parameters, generator, states, practice) as a manipulable learner."""
        return cls(learner.params, learner.rng, learner.x_fast, learner.x_slow, learner.practice,
                   learner.session_trial, learner.session_rewards)

    def start_session(self, break_hours: float | None) -> None:
        super().start_session(break_hours)
        if self.fast_lost:
            self.x_fast = 0.0


def start(learner: ManipulatedLearner, kind: str | None) -> None:
    """Apply `kind` (None: no manipulation) for the session about to start; clears the record."""
    if kind is not None and kind not in KINDS:
        raise ValueError(f"unknown manipulation {kind!r} (known: {', '.join(KINDS)})")
    learner.fast_inactive = kind == "inactivate_fast"
    if kind == "lesion_fast":
        learner.x_fast, learner.fast_lost = 0.0, True
    learner.record = []


def finish(learner: ManipulatedLearner) -> None:
    """End of session: an acute inactivation wears off."""
    learner.fast_inactive = False


def expected_hit_rate(record: list[tuple[float, float]], low_ms: float, high_ms: float,
                      naive_ms: float) -> float | None:
    """Mean over completed trials of P(low <= naive * exp(N(mean, sd)) <= high); None without trials."""
    if not record:
        return None
    lo, hi = math.log(low_ms / naive_ms), math.log(high_ms / naive_ms)
    total = 0.0
    for mean, sd in record:
        if sd <= 0:
            total += float(lo <= mean <= hi)
        else:
            total += _phi((hi - mean) / sd) - _phi((lo - mean) / sd)
    return total / len(record)


def _phi(z: float) -> float:
    return 0.5 * (1.0 + math.erf(z / math.sqrt(2.0)))


def train(animal: Animal, days: list, out: Path | None, plan: dict[int, str],
          written: Callable[[str], None] | None = None) -> None:
    """Like `history.train`, with `plan` = {session index (from 1): kind} applied at those sessions.

    Each session record gains `manipulation` (the kind or None) and
    `expected_hit_rate` (mock_rig.manipulations.expected_hit_rate over its
    completed trials, with the window in force at its end).
    """
    from mock_rig import scenario
    from mock_rig.history import run_session, write_whole

    if not isinstance(animal.learner, ManipulatedLearner):
        animal.learner = ManipulatedLearner.like(animal.learner)
    learner = animal.learner
    for day in days:
        index = len(animal.sessions) + 1
        kind = plan.get(index)
        start(learner, kind)
        begin = scenario.session_start(day, animal.shift, float(animal.rng.uniform(-10, 10)))
        data, session, board = run_session(animal, begin)
        name = f"{animal.name}_s{index:02d}.rsw"
        if out is not None:
            write_whole(out.joinpath(name), data)
            if written is not None:
                written(name)
        record = animal.close_session(session, board, name)
        record["manipulation"] = kind
        record["expected_hit_rate"] = expected_hit_rate(learner.record, session.low_ms, session.high_ms,
                                                        learner.params.naive_ms)
        finish(learner)


def write_history(out: Path, animals: list, days: int, plans: dict[str, dict[int, str]],
                  written: Callable[[str], None] | None = None) -> dict:
    """`history.write_history` with manipulations: `plans` = {animal: {session index: kind}}; the truth
    file gains `manipulations` = {animal: {session index: kind}} and per-session expected hit rates.
    `written(name)` follows each session file."""
    import json

    from mock_rig import scenario
    from mock_rig.history import truth_document, write_whole
    from mock_rig.protocol_file import protocol_toml

    out.mkdir(parents=True, exist_ok=True)
    session_days = scenario.session_days(scenario.FIRST_DAY, days)
    for animal in animals:
        train(animal, session_days, out, plans.get(animal.name, {}), written)
        write_whole(out.joinpath(f"{animal.name}.protocol.toml"), protocol_toml(animal.protocol).encode())
    truth = truth_document(animals)
    truth["manipulations"] = {name: {str(k): v for k, v in plan.items()} for name, plan in plans.items()}
    truth["definitions"]["expected_hit_rate"] = ("mean over completed trials of the hit chance the latent states "
                                                 "give, with the window in force at the session's end")
    write_whole(out.joinpath("truth.json"), json.dumps(truth, indent=1).encode())
    return truth


class BoxRecord(NamedTuple):
    """One attempt as the box judged it (plain values; the analysis side makes its own records)."""

    t_us: int
    interval_ms: float  # nan when there is none
    target_ms: float
    window_low_ms: float
    window_high_ms: float
    stage: str
    outcome: str  # hit | miss | premature | lone | omission


class SimulatedSession(NamedTuple):
    """A session's attempts, its length and the hit rate its latent states predict."""

    records: list[BoxRecord]
    minutes: float
    expected_hit_rate: float | None


def final_stage_session(learner: ManipulatedLearner, protocol, rng) -> SimulatedSession:
    """One session of `protocol`'s final stage, run by the box without encoding bytes."""
    from mock_rig.tasks import Session

    box = Session(protocol, len(protocol.stages) - 1, learner, rng)
    records: list[BoxRecord] = []
    while (chunk := box.next_chunk()) is not None:
        downs = [t for t, name, _ in chunk if name == "lever_down"]
        words = [args[0] for _, name, args in chunk if name == "outcome"]
        if not words:
            continue
        timed = len(downs) >= 2 and words[0] in ("hit", "miss", "premature")
        records.append(BoxRecord(downs[0] if downs else 0, (downs[1] - downs[0]) / 1000.0 if timed else math.nan,
                                 box.stage.target_ms, box.low_ms, box.high_ms, box.stage.name, str(words[0])))
    expected = expected_hit_rate(learner.record, box.low_ms, box.high_ms, learner.params.naive_ms)
    return SimulatedSession(records, (box.now - box.start_us) / 60e6, expected)


def manipulated_animal(seed: int, fraction: float, kind: str, protocol, baseline: int = 3
                       ) -> tuple[float, list[SimulatedSession]]:
    """An animal at the plateau with `fraction` of its learned change in the slow state, trained `baseline`
    daily final-stage sessions and then one session under `kind`; returns (the slow fraction at the end of
    the last session before it, the sessions)."""
    import numpy as np

    from mock_rig.learner import draw_params

    rng = np.random.default_rng([seed, 23])
    params = draw_params(rng)
    learned = math.log(protocol.final.target_ms / params.naive_ms)
    learner = ManipulatedLearner(params, rng, x_fast=(1 - fraction) * learned, x_slow=fraction * learned,
                                 practice=20000)
    sessions, stage = [], 0.0
    for index in range(1, baseline + 2):
        learner.start_session(23.0)
        start(learner, kind if index == baseline + 1 else None)
        sessions.append(final_stage_session(learner, protocol, rng))
        finish(learner)
        if index == baseline:
            stage = learner.consolidation()
    return stage, sessions


def parse_plan(text: str) -> tuple[str, int, str]:
    """`ANIMAL:SESSION:KIND` (e.g. `alder:10:inactivate_fast`) -> (animal, session, kind); ValueError otherwise."""
    parts = text.split(":")
    if len(parts) != 3 or not parts[0] or not parts[1].isdigit() or int(parts[1]) < 1:
        raise ValueError(f"expected ANIMAL:SESSION:KIND with SESSION from 1, got {text!r}")
    if parts[2] not in KINDS:
        raise ValueError(f"unknown manipulation {parts[2]!r} (known: {', '.join(KINDS)})")
    return parts[0], int(parts[1]), parts[2]
