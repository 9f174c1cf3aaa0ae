"""Simulated manipulations whose effect depends on how far the animal's learning has consolidated.

Rule: a manipulation acts on the learner's two states at the start of a
session. `inactivate_fast` (acute, test): for that session the fast state
neither contributes to the output nor learns, and nothing moves from it to
the slow state, so behaviour falls back to what the slow state alone gives;
the fast state is back, unchanged, the next session. `lesion_fast` (lasting,
test): what the fast state holds is lost for good at that session (x_fast =
0) and it learns again from there. `vehicle` (acute) and `sham` (lasting) are
controls that remove nothing. The less consolidated the animal (the larger
x_fast against x_slow), the larger the drop. `ManipulatedLearner` records,
per completed trial, the mean and SD of the log output it was drawn from, so
`expected_hit_rate` gives the hit rate a session's latent states predict:
the simulated truth an estimated effect is judged against.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import NamedTuple

from mock_rig.learner import Learner, TrialLatent

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
    record: list[tuple[float, float]] = field(default_factory=list)

    @property
    def x(self) -> float:
        """The learned change the output carries (the slow state alone while the fast one is inactive)."""
        return self.x_slow if self.fast_inactive else self.x_fast + self.x_slow

    def learn_log(self, f: float, y: float, noise: float, rewarded: bool, clamp: bool = False) -> TrialLatent:
        self.record.append((y - noise, self.sigma_now()))
        if not self.fast_inactive:
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


def start(learner: ManipulatedLearner, kind: str | None) -> None:
    """Apply `kind` (None: no manipulation) for the session about to start; clears the record."""
    if kind is not None and kind not in KINDS:
        raise ValueError(f"unknown manipulation {kind!r} (known: {', '.join(KINDS)})")
    learner.fast_inactive = kind == "inactivate_fast"
    if kind == "lesion_fast":
        learner.x_fast = 0.0
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
