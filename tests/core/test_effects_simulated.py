"""Effects validated on simulated animals (mock_rig's manipulations): coverage, cohort trend, controls.

The simulated truth is the hit rate each session's latent states predict
(mock_rig.manipulations.expected_hit_rate); an effect's truth is the
manipulated session's minus the mean of its baseline sessions'.
"""

from __future__ import annotations

import math
from dataclasses import replace

import numpy as np
import pytest

from mock_rig import scenario
from mock_rig.manipulations import manipulated_animal
from monitor.core.effects.animal import SessionTrials, animal_effect
from monitor.core.effects.cohort import trend
from monitor.core.session.trials import Trial

pytestmark = pytest.mark.slow  # simulated cohorts fitted animal by animal: seconds per test

ANIMALS = 80      # tests; as many again would add time, not insight, for the controls: CONTROLS
CONTROLS = 40
PROTOCOL = replace(scenario.two_press_protocol(650), max_trials=200, max_minutes=20.0)


def _animal(seed: int, fraction: float, kind: str) -> tuple[float, float, object]:
    """(slow fraction at the end of the last baseline session, true hit-rate effect, estimated effect)."""
    stage, simulated = manipulated_animal(seed, fraction, kind, PROTOCOL)
    sessions = [SessionTrials(i, [Trial(k, r.t_us, r.interval_ms, r.target_ms, r.window_low_ms, r.window_high_ms,
                                        r.stage, r.outcome, r.outcome == "hit", "rig", r.outcome, 0)
                                  for k, r in enumerate(s.records, start=1)], s.minutes)
                for i, s in enumerate(simulated, start=1)]
    truths = [s.expected_hit_rate for s in simulated]
    effect = animal_effect(sessions[3], sessions[:3], seed=seed)
    return stage, truths[3] - float(np.mean(truths[:3])), effect


@pytest.fixture(scope="module")
def tested() -> list[tuple[float, float, object]]:
    return [_animal(k, 0.1 + 0.85 * k / (ANIMALS - 1), "inactivate_fast") for k in range(ANIMALS)]


@pytest.fixture(scope="module")
def controls() -> list[tuple[float, float, object]]:
    return [_animal(1000 + k, 0.1 + 0.85 * k / (CONTROLS - 1), "vehicle") for k in range(CONTROLS)]


def test_interval_covers_the_simulated_effect_in_most_animals(tested):
    covered = 0
    for _, truth, effect in tested:
        e = effect.vs_baseline["hit_rate"]
        covered += e.low <= truth <= e.high
    # 95 % intervals: at least 90 % of the cohort covered (the acceptance line; a correct interval falls below
    # it with probability scipy.stats.binom.cdf(71, 80, 0.95) ~ 0.03)
    assert covered >= 0.9 * ANIMALS, f"{covered}/{ANIMALS} intervals cover the simulated effect"


def test_the_effect_is_real_where_the_fast_state_carried_much(tested):
    early = [effect for stage, _, effect in tested if stage < 0.7]
    assert early and all(e.vs_baseline["hit_rate"].high < 0 for e in early)


def test_cohort_trend_recovers_the_simulated_dependence(tested):
    xs = [stage for stage, _, _ in tested]
    estimated = [effect.vs_baseline["hit_rate"].effect for _, _, effect in tested]
    true_line = trend(xs, [truth for _, truth, _ in tested])
    fitted = trend(xs, estimated)
    assert true_line is not None and fitted is not None
    assert true_line.slope > 0 and fitted.slope_low > 0          # the sign: later, a smaller drop
    assert fitted.slope_low <= true_line.slope <= fitted.slope_high  # the size, within the trend's interval


def test_a_control_shows_no_effect_beyond_chance(controls):
    beyond = sum(bool(effect.vs_baseline["hit_rate"].excludes_zero) for _, _, effect in controls)
    # binomial(40, 0.05): P(X >= 7) ~ 0.004 (scipy.stats.binom.sf(6, 40, 0.05)); learning still moves a little
    assert beyond <= 6, f"{beyond}/{CONTROLS} control intervals exclude 0"
    # over the group, the estimates agree with the simulated effects (what learning still does from day to
    # day, nothing from the vehicle) within 3 standard errors of their mean (99.7 % of a normal law)
    errors = [e.vs_baseline["hit_rate"].effect - truth for _, truth, e in controls]
    se = math.sqrt(sum(((e.vs_baseline["hit_rate"].high - e.vs_baseline["hit_rate"].low) / 3.92) ** 2
                       for _, _, e in controls)) / len(controls)
    assert abs(float(np.mean(errors))) < 3 * se
    assert abs(float(np.mean([truth for _, truth, _ in controls]))) < 0.02   # the simulated controls: near 0
