"""Learner model: the classic two-state model's published check values, the scalar
property, forgetting across breaks, the variants, and the plateau timescale."""

import math

import numpy as np
import pytest
from scipy import stats

from mock_rig.learner import (
    OUTCOME_DRIVEN,
    Learner,
    LearnerParams,
    classic_params,
    consolidation_fraction,
    draw_params,
)


def classic() -> Learner:
    return Learner(classic_params())


def run(learner: Learner, f: float, n: int, clamp: bool = False) -> list[float]:
    return [learner.classic_trial(f, clamp).x_fast + learner.x_slow for _ in range(n)]


# Outside check: Smith, Ghazizadeh & Shadmehr 2006 two-state model with its parameters
# (A_f=0.92, B_f=0.03, A_s=0.996, B_s=0.004); check values from ../shared/REFERENCES.md [checked].
def test_classic_adaptation_matches_published_check_values():
    xs = run(classic(), 1.0, 400)
    assert xs[0] == pytest.approx(0.034, abs=1e-12)
    assert xs[9] == pytest.approx(0.21863, abs=5e-6)
    assert xs[99] == pytest.approx(0.43241, abs=5e-6)
    assert xs[399] == pytest.approx(0.56024, abs=5e-6)
    long = classic()
    run(long, 1.0, 20000)
    assert long.x == pytest.approx(0.578947, abs=1e-6)  # REFERENCES.md: K/(1+K), K = 1.375
    assert long.x_fast == pytest.approx(0.157895, abs=1e-6)
    assert long.x_slow == pytest.approx(0.421053, abs=1e-6)


# Outside check: REFERENCES.md spontaneous recovery (Smith et al. 2006 paradigm) [checked]:
# 400 trials at +1, f = -1 until x <= 0 takes 17 trials (states -0.28865 / +0.28864),
# then under error clamp x peaks at 0.23572 on clamp trial 38 and is 0.08673 after 300.
def test_classic_reversal_and_error_clamp_spontaneous_recovery():
    learner = classic()
    run(learner, 1.0, 400)
    reversal = 0
    while learner.x > 0:
        learner.classic_trial(-1.0)
        reversal += 1
    assert reversal == 17
    assert learner.x_fast == pytest.approx(-0.28865, abs=5e-6)
    assert learner.x_slow == pytest.approx(0.28864, abs=5e-6)
    clamp = run(learner, -1.0, 300, clamp=True)
    peak = int(np.argmax(clamp))
    assert peak + 1 == 38
    assert clamp[peak] == pytest.approx(0.23572, abs=5e-6)
    assert clamp[-1] == pytest.approx(0.08673, abs=5e-6)


# Outside check: REFERENCES.md savings [checked]: x >= 0.3 takes 21 trials naive, 8 after reversal.
def test_classic_savings():
    def trials_to(learner: Learner) -> int:
        n = 0
        while learner.x < 0.3:
            learner.classic_trial(1.0)
            n += 1
        return n

    assert trials_to(classic()) == 21
    learner = classic()
    run(learner, 1.0, 400)
    while learner.x > 0:
        learner.classic_trial(-1.0)
    assert trials_to(learner) == 8


# Outside check: numpy's matrix recursion of the same linear system (state-space form).
def test_classic_equals_numpy_state_space_recursion():
    rng = np.random.default_rng(4)
    f = rng.choice([-1.0, 0.0, 1.0], size=300)
    clamp = rng.random(300) < 0.2
    a = np.array([[0.92, 0.0], [0.0, 0.996]])
    b = np.array([0.03, 0.004])
    state = np.zeros(2)
    learner = classic()
    for fn, cn in zip(f, clamp):
        e = 0.0 if cn else fn - state.sum()
        state = a @ state + b * e
        learner.classic_trial(float(fn), bool(cn))
        assert (learner.x_fast, learner.x_slow) == pytest.approx(tuple(state), abs=1e-12)


def trained(target_ms: float, sigma: float = 0.2, seed: int = 0) -> Learner:
    learner = Learner(LearnerParams(sigma=sigma, sigma_naive=sigma), np.random.default_rng(seed))
    learner.x_slow = math.log(target_ms / learner.params.naive_ms)
    return learner


# Outside check: scalar property of interval timing (Gibbon 1977): SD proportional to the
# mean, so CV is the same at every target. scipy.stats.levene on log(interval/target) tests
# equal spread; on raw intervals it must reject (spread grows with the target).
@pytest.mark.parametrize("sigma", [0.1, 0.2, 0.3])
def test_scalar_property_cv_constant_across_targets(sigma):
    targets = [400, 800, 1200, 1600]
    learners = {t: trained(t, sigma, t) for t in targets}
    samples = {t: np.array([learners[t].produce_ms()[0] for _ in range(1500)]) for t in targets}
    cvs = [samples[t].std() / samples[t].mean() for t in targets]
    expected_cv = math.sqrt(math.exp(sigma**2) - 1)  # log-normal CV (textbook formula)
    assert cvs == pytest.approx([expected_cv] * 4, rel=0.12)
    logs = [np.log(samples[t] / t) for t in targets]
    assert stats.levene(*logs).pvalue > 0.001
    assert stats.levene(*samples.values()).pvalue < 1e-6
    slope = stats.linregress([samples[t].mean() for t in targets], [samples[t].std() for t in targets])
    assert abs(slope.intercept) < 0.2 * samples[400].std()  # SD through the origin: proportional


def test_break_forgetting_depends_on_hours():
    params = LearnerParams()
    overnight, weekend = Learner(params), Learner(params)
    for learner, hours in ((overnight, 23.0), (weekend, 71.0)):
        learner.x_fast, learner.x_slow = 0.5, 0.4
        learner.start_session(hours)
    assert weekend.x_fast < overnight.x_fast < 0.5
    assert overnight.x_fast == pytest.approx(0.5 * math.exp(-23 / params.fast_break_tau_h))
    assert weekend.x_slow > 0.4 * 0.99  # the slow state keeps what it has


def test_slow_state_absorbs_fast_learning_by_repetition():
    learner = Learner(LearnerParams(sigma=0.0, sigma_naive=0.0))
    f = math.log(650 / 250)
    for _ in range(20000):
        y, noise = learner.produce()
        learner.learn_log(f, y, noise, rewarded=True)
    assert learner.x == pytest.approx(f, rel=0.05)
    assert learner.consolidation() > 0.9
    assert learner.x_slow > 0.9 * f


def test_consolidation_fraction_in_unit_interval():
    for xf, xs in [(0.3, 0.1), (-0.2, 0.5), (0.0, 0.0), (0.1, -0.4)]:
        assert 0.0 <= consolidation_fraction(xf, xs) <= 1.0
    assert consolidation_fraction(0.25, 0.75) == pytest.approx(0.75)


def session_hit_rates(
    params: LearnerParams, seed: int, sessions: int, per_session: int = 500, target_ms: float = 650
):
    """A learner on one target with a ±20 % window, weekday sessions."""
    learner = Learner(params, np.random.default_rng(seed))
    f = math.log(target_ms / params.naive_ms)
    rates = []
    for s in range(sessions):
        learner.start_session(None if s == 0 else (71.0 if s % 5 == 0 else 23.0))
        hits = 0
        for _ in range(per_session):
            y, noise = learner.produce()
            hit = abs(y - f) <= math.log(1.2)
            learner.learn_log(f, y, noise, hit)
            hits += hit
        rates.append(hits / per_session)
    return np.array(rates)


def test_default_learner_plateaus_after_order_ten_thousand_trials():
    # REFERENCES.md / trade fact: learning a two-press interval task takes ~10^4 trials.
    rates = session_hit_rates(LearnerParams(), seed=1, sessions=80)
    asymptote = rates[-20:].mean()
    smooth = np.convolve(rates, np.ones(3) / 3, mode="valid")
    first = int(np.argmax(smooth >= 0.9 * asymptote)) + 1
    trials = first * 500
    assert 3000 <= trials <= 30000


def test_outcome_driven_learner_moves_toward_target():
    # a binary reward teaches only where rewards happen: a target within reach (1.4x naive)
    learner = Learner(LearnerParams(drive=OUTCOME_DRIVEN), np.random.default_rng(2))
    f = math.log(350 / learner.params.naive_ms)
    for _ in range(5000):
        y, noise = learner.produce()
        learner.learn_log(f, y, noise, abs(y - f) <= math.log(1.2))
    assert 0.6 * f < learner.x < 1.3 * f
    error_driven = Learner(LearnerParams(), np.random.default_rng(2))
    for _ in range(5000):
        y, noise = error_driven.produce()
        error_driven.learn_log(f, y, noise, False)  # learns although never rewarded
    assert error_driven.x > 0.6 * f


def test_warmup_and_satiety_offsets():
    learner = Learner(LearnerParams(warmup_offset=-0.3, satiety_rewards=100.0))
    learner.start_session(None)
    assert learner.offset_now() == pytest.approx(-0.3)
    learner.session_trial, learner.session_rewards = 200, 100
    assert learner.offset_now() == pytest.approx(0.25, abs=1e-3)  # warm-up faded, sated


def test_variability_narrows_with_practice():
    learner = Learner(LearnerParams(sigma=0.15, sigma_naive=0.45))
    early = learner.sigma_now()
    learner.practice = 20000
    assert early == pytest.approx(0.45) and learner.sigma_now() == pytest.approx(0.15, abs=0.01)


def test_cohort_parameters_spread_and_reproducible():
    draws = [draw_params(np.random.default_rng([5, i])) for i in range(40)]
    again = [draw_params(np.random.default_rng([5, i])) for i in range(40)]
    assert draws == again
    transfer = np.array([p.transfer for p in draws])
    assert 0.2 < np.std(np.log(transfer)) < 0.7  # log-normal spread of 0.4
    assert all(p.a_fast <= 1.0 for p in draws)
