"""Simulated learner: a fast and a slow process on different timescales.

Rule: the animal's produced interval (or hold time) is `naive_ms * exp(y)` with
y = x_fast + x_slow + offsets + noise, in log units, so the spread is
proportional to the mean (the scalar property of timing; Gibbon 1977). The
task asks for the change f = log(target_ms / naive_ms); the error the animal
experiences is e = f - y (observed output; 0 on error-clamp trials). Per
learning trial:

    x_fast <- a_fast * x_fast + drive - transfer * x_fast
    x_slow <- a_slow * x_slow + b_slow * e + transfer * x_fast

where drive = b_fast * e (error-driven) or b_outcome * rewarded * noise
(outcome-driven: a rewarded sample pulls the mean toward itself). `transfer`
is the repetition-driven slow process absorbing what the fast one has learned;
`b_slow` is the classic error-driven slow input. With transfer = 0, no noise
and no offsets this is exactly the two-state model of Smith, Ghazizadeh &
Shadmehr 2006. Between sessions each state keeps exp(-hours / tau) of itself
(the fast one forgets in a day, the slow one keeps for months), so a weekend
costs more than a night. Warm-up (a session-start offset that decays), satiety
(a late-session drift with rewards earned) and variability that narrows with
practice are switchable variants.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field, replace

import numpy as np

ERROR_DRIVEN = "error"
OUTCOME_DRIVEN = "outcome"


@dataclass(frozen=True)
class LearnerParams:
    """One animal's learning parameters (log-ratio units, per learning trial)."""

    naive_ms: float = 250.0  # produced interval before any learning
    a_fast: float = 0.9997  # fast retention per trial within a session
    b_fast: float = 0.004  # fast gain on the signed error
    b_outcome: float = 0.03  # fast gain on a rewarded sample (outcome-driven)
    a_slow: float = 1.0  # slow retention per trial
    b_slow: float = 0.0  # slow gain on the error (classic model only)
    transfer: float = 0.00018  # fraction of x_fast the slow state absorbs per trial
    drive: str = ERROR_DRIVEN  # "error" or "outcome"
    fast_break_tau_h: float = 20.0  # fast retention across a break: exp(-h / tau)
    slow_break_tau_h: float = 20000.0  # slow retention across a break
    sigma: float = 0.2  # SD of log(interval) at the end of practice (CV ~ sigma)
    sigma_naive: float = 0.2  # SD before practice (narrowing variant: larger)
    narrowing_trials: float = 4000.0  # practice trials for the SD to narrow by 1/e
    warmup_offset: float = 0.0  # log offset on a session's first trial (variant)
    warmup_trials: float = 25.0  # trials for the warm-up offset to fade by 1/e
    satiety_rewards: float = 0.0  # rewards at which satiety drift = satiety_offset (0 = off)
    satiety_offset: float = 0.25  # log offset (slower, lazier) at satiety_rewards
    lone_rate: float = 0.03  # chance that a trial's second press never comes
    omission_rate: float = 0.02  # chance of not responding at all on a trial
    iti_press_rate: float = 0.6  # mean presses per inter-trial interval, naive
    iti_press_floor: float = 0.05  # ... after long practice
    double_tap_rate: float = 0.04  # chance of a second press right after the first, naive
    impulsivity_trials: float = 3000.0  # practice trials for both to fade by 1/e
    latency_s: float = 1.5  # mean delay from trial start to the first press

    def with_(self, **changes: object) -> "LearnerParams":
        """A copy with some fields changed."""
        return replace(self, **changes)


def classic_params(
    a_fast: float = 0.92, b_fast: float = 0.03, a_slow: float = 0.996, b_slow: float = 0.004
) -> LearnerParams:
    """Exactly the Smith, Ghazizadeh & Shadmehr 2006 two-state model (defaults: its parameters)."""
    return LearnerParams(
        naive_ms=1000.0,
        a_fast=a_fast,
        b_fast=b_fast,
        a_slow=a_slow,
        b_slow=b_slow,
        transfer=0.0,
        sigma=0.0,
        sigma_naive=0.0,
        fast_break_tau_h=math.inf,
        slow_break_tau_h=math.inf,
    )


# Cohort spreads: multiplicative (log-normal SD) per parameter; common practice
# for simulated cohorts, chosen so animals differ by roughly a factor 1.5.
COHORT_SPREAD: dict[str, float] = {
    "naive_ms": 0.15,
    "b_fast": 0.3,
    "b_outcome": 0.3,
    "transfer": 0.4,
    "fast_break_tau_h": 0.35,
    "sigma": 0.15,
    "lone_rate": 0.4,
    "omission_rate": 0.4,
    "iti_press_rate": 0.4,
    "double_tap_rate": 0.4,
    "latency_s": 0.3,
}


def draw_params(rng: np.random.Generator, base: LearnerParams | None = None) -> LearnerParams:
    """One animal of a cohort: `base` with each spread parameter scaled log-normally."""
    base = base or LearnerParams()
    changes: dict[str, float] = {}
    for name, spread in COHORT_SPREAD.items():
        changes[name] = float(getattr(base, name) * math.exp(rng.normal(0.0, spread)))
    if base.sigma_naive != base.sigma:
        changes["sigma_naive"] = base.sigma_naive * changes["sigma"] / base.sigma
    else:
        changes["sigma_naive"] = changes["sigma"]
    changes["a_fast"] = min(base.a_fast, 1.0)
    return replace(base, **changes)


@dataclass
class TrialLatent:
    """What the model knew and did on one learning trial (for tests and truth)."""

    y: float  # produced log(interval / naive_ms)
    error: float  # e used for learning (0 on clamp trials)
    x_fast: float  # states after the update
    x_slow: float


@dataclass
class Learner:
    """A simulated animal's learning state; deterministic given its generator."""

    params: LearnerParams = field(default_factory=LearnerParams)
    rng: np.random.Generator = field(default_factory=lambda: np.random.default_rng(0))
    x_fast: float = 0.0
    x_slow: float = 0.0
    practice: int = 0  # learning trials so far (all sessions)
    session_trial: int = 0  # learning trials in the current session
    session_rewards: int = 0

    @property
    def x(self) -> float:
        """Total learned change in log units."""
        return self.x_fast + self.x_slow

    def start_session(self, break_hours: float | None) -> None:
        """Begin a session; `break_hours` since the last one (None: the first)."""
        if break_hours is not None and break_hours > 0:
            p = self.params
            self.x_fast *= _keep(break_hours, p.fast_break_tau_h)
            self.x_slow *= _keep(break_hours, p.slow_break_tau_h)
        self.session_trial = 0
        self.session_rewards = 0

    def sigma_now(self) -> float:
        """SD of log(interval) on the next trial (narrows with practice when configured)."""
        p = self.params
        if p.sigma_naive == p.sigma:
            return p.sigma
        return p.sigma + (p.sigma_naive - p.sigma) * math.exp(-self.practice / p.narrowing_trials)

    def offset_now(self) -> float:
        """Warm-up and satiety offsets on the next trial (log units)."""
        p = self.params
        offset = 0.0
        if p.warmup_offset:
            offset += p.warmup_offset * math.exp(-self.session_trial / p.warmup_trials)
        if p.satiety_rewards > 0:
            offset += p.satiety_offset * (self.session_rewards / p.satiety_rewards) ** 2
        return offset

    def satiety(self) -> float:
        """0 when thirsty, about 1 at `satiety_rewards` (0 when the variant is off)."""
        p = self.params
        return self.session_rewards / p.satiety_rewards if p.satiety_rewards > 0 else 0.0

    def produce(self) -> tuple[float, float]:
        """Sample the next trial's output; return (y, noise) in log units."""
        sigma = self.sigma_now()
        noise = float(self.rng.normal(0.0, sigma)) if sigma > 0 else 0.0
        return self.x + self.offset_now() + noise, noise

    def produce_ms(self) -> tuple[float, float, float]:
        """Sample the next interval; return (interval_ms, y, noise)."""
        y, noise = self.produce()
        return self.params.naive_ms * math.exp(y), y, noise

    def learn(
        self, target_ms: float | None, y: float, noise: float, rewarded: bool, clamp: bool = False
    ) -> TrialLatent:
        """Update both states after a completed trial that produced `y`."""
        f = 0.0 if target_ms is None else math.log(target_ms / self.params.naive_ms)
        return self.learn_log(f, y, noise, rewarded, clamp)

    def learn_log(
        self, f: float, y: float, noise: float, rewarded: bool, clamp: bool = False
    ) -> TrialLatent:
        """Update with the required change `f` in log units (the model's perturbation)."""
        p = self.params
        error = 0.0 if clamp else f - y
        if p.drive == OUTCOME_DRIVEN:
            drive = p.b_outcome * noise if rewarded and not clamp else 0.0
        else:
            drive = p.b_fast * error
        moved = p.transfer * self.x_fast
        new_fast = p.a_fast * self.x_fast + drive - moved
        self.x_slow = p.a_slow * self.x_slow + p.b_slow * error + moved
        self.x_fast = new_fast
        self.practice += 1
        self.session_trial += 1
        self.session_rewards += int(rewarded)
        return TrialLatent(y, error, self.x_fast, self.x_slow)

    def classic_trial(self, f: float, clamp: bool = False) -> TrialLatent:
        """One noiseless trial of the classic model: e = f - x (0 when clamped)."""
        y = self.x
        return self.learn_log(f, y, 0.0, rewarded=False, clamp=clamp)

    def consolidation(self) -> float:
        """slow / (fast + slow) of the learned change's magnitudes, in [0, 1]."""
        return consolidation_fraction(self.x_fast, self.x_slow)

    def iti_press_rate_now(self) -> float:
        """Mean presses per inter-trial interval (impulsivity fades with practice)."""
        p = self.params
        fade = math.exp(-self.practice / p.impulsivity_trials)
        return p.iti_press_floor + (p.iti_press_rate - p.iti_press_floor) * fade

    def double_tap_rate_now(self) -> float:
        """Chance that the second press follows the first at once (fades with practice)."""
        p = self.params
        return p.double_tap_rate * (0.1 + 0.9 * math.exp(-self.practice / p.impulsivity_trials))


def consolidation_fraction(x_fast: float, x_slow: float) -> float:
    """|x_slow| / (|x_fast| + |x_slow|); 0 before any learning."""
    total = abs(x_fast) + abs(x_slow)
    return abs(x_slow) / total if total > 0 else 0.0


def _keep(hours: float, tau_h: float) -> float:
    return 1.0 if math.isinf(tau_h) else math.exp(-hours / tau_h)
