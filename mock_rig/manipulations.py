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


def train(animal: Animal, days: list, out: Path | None, plan: dict[int, str]) -> None:
    """Like `history.train`, with `plan` = {session index (from 1): kind} applied at those sessions.

    Each session record gains `manipulation` (the kind or None) and
    `expected_hit_rate` (mock_rig.manipulations.expected_hit_rate over its
    completed trials, with the window in force at its end).
    """
    from mock_rig import scenario
    from mock_rig.history import run_session

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
            out.joinpath(name).write_bytes(data)
        record = animal.close_session(session, board, name)
        record["manipulation"] = kind
        record["expected_hit_rate"] = expected_hit_rate(learner.record, session.low_ms, session.high_ms,
                                                        learner.params.naive_ms)
        finish(learner)


def write_history(out: Path, animals: list, days: int, plans: dict[str, dict[int, str]]) -> dict:
    """`history.write_history` with manipulations: `plans` = {animal: {session index: kind}}; the truth
    file gains `manipulations` = {animal: {session index: kind}} and per-session expected hit rates."""
    import json

    from mock_rig import scenario
    from mock_rig.history import truth_document
    from mock_rig.protocol_file import protocol_toml

    out.mkdir(parents=True, exist_ok=True)
    session_days = scenario.session_days(scenario.FIRST_DAY, days)
    for animal in animals:
        train(animal, session_days, out, plans.get(animal.name, {}))
        out.joinpath(f"{animal.name}.protocol.toml").write_text(protocol_toml(animal.protocol))
    truth = truth_document(animals)
    truth["manipulations"] = {name: {str(k): v for k, v in plan.items()} for name, plan in plans.items()}
    truth["definitions"]["expected_hit_rate"] = ("mean over completed trials of the hit chance the latent states "
                                                 "give, with the window in force at the session's end")
    out.joinpath("truth.json").write_text(json.dumps(truth, indent=1))
    return truth
