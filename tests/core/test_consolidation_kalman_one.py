"""The one-state filter (kalman_one): against a textbook trial-by-trial Kalman filter, and equal to the two-state
code on the one-rate state space, value and gradient."""

from __future__ import annotations

from dataclasses import replace

import numpy as np
import pytest

from monitor.core.consolidation.kalman import Layout, kalman_filter, pad, profile_effects
from monitor.core.consolidation.kalman_one import one_state, steady_variance
from monitor.core.consolidation.kalman_tangent import profile_gradient
from monitor.core.consolidation.model import (ONE_RATE, layout_for, prepare, simulate, state_space,
                                              state_space_tangents, to_natural)

TRUTH = {"a_f": 0.95, "b_f": 0.05, "c": 1.2e-3, "slow_leak": 1e-5, "tau_b": 20.0, "q_f": 1e-3, "q_s": 1e-5}
THETAS = [np.array([2.0, -1.0, 0.5, -3.0]), np.array([-1.5, 1.2, -2.0, 1.0]), np.array([6.0, -4.0, 3.0, -8.0])]


def _prep(groups: int, lengths: tuple[int, ...] = (2, 150, 1, 90, 3, 210, 40, 120)):
    """A short animal whose sessions (some of 1-3 trials: the variance never settles) fall in ``groups`` groups."""
    rng = np.random.default_rng(11)
    lengths = np.array(lengths)
    sim = simulate(TRUTH, lengths, rng.choice([10.0, 22.0, 48.0, 70.0], len(lengths)), rng, warmup=-0.2)
    prep = prepare(sim.series)
    layout = Layout(prep.starts, prep.layout_lengths, np.tile(np.eye(2), (len(lengths), 1, 1)))
    padded = {v: pad(layout, prep.y, prep.inputs[v], max_groups=groups, group_cost=0.0) for v in prep.padded}
    return replace(prep, padded=padded)


def _one(prep, params, variant, gradient=False):
    return one_state(params["a_f"], params["b_f"], params["q_f"], prep.hours, params["tau_b"], prep.layout_lengths,
                     prep.padded[variant], prep.effects, gradient=gradient)


def _textbook(prep, params, variant):
    """Sum of v_c v_d / S and of ln S over the trials, trial by trial: predict, update, and across a break
    x <- rho x (the Kalman filter as textbooks write it; common practice).  Column 0 is the data from a zero
    start, column e + 1 the observation offset -effects[e] with no input."""
    a, b, q, tau = params["a_f"], params["b_f"], params["q_f"], params["tau_b"]
    y, u = prep.y, prep.inputs[variant]
    n_cols = 1 + prep.effects.shape[0]
    gram, logdet = np.zeros((n_cols, n_cols)), 0.0
    mean, var = np.zeros(n_cols), q
    for k, (start, length) in enumerate(zip(prep.starts, prep.layout_lengths)):
        if k:
            rho = np.exp(-prep.hours[k] / tau)
            mean, var = rho * mean, rho * rho * var
        for t in range(length):
            obs = np.concatenate(([y[start + t]], -prep.effects[:, t]))
            drive = np.zeros(n_cols)
            drive[0] = b * u[start + t]
            innovation, total = obs - mean, var + 1.0
            gram += np.outer(innovation, innovation) / total
            logdet += np.log(total)
            mean = a * (mean + var / total * innovation) + drive
            var = a * a * var / total + q
    return gram, logdet


def test_the_steady_variance_is_the_riccati_fixed_point():
    # check value: p = a^2 p / (p + 1) + q, the scalar Riccati equation (common practice)
    for a, q in [(0.3, 1e-7), (0.99995, 1e-7), (0.9, 1.0), (0.5, 0.3)]:
        p = steady_variance(a, q)
        assert p == pytest.approx(a * a * p / (p + 1.0) + q, rel=1e-13)


@pytest.mark.parametrize("lengths", [(2, 150, 1, 90, 3, 210, 40, 120), (300,), (1, 1, 2)])
@pytest.mark.parametrize("variant", ["error", "outcome"])
def test_the_one_state_filter_matches_a_textbook_filter(variant, lengths):
    prep = _prep(groups=min(3, len(lengths)), lengths=lengths)
    for theta in THETAS:
        params = to_natural(theta, ONE_RATE)
        out = _one(prep, params, variant)
        gram, logdet = _textbook(prep, params, variant)
        np.testing.assert_allclose(out.gram, gram, rtol=1e-9, atol=1e-9 * np.abs(gram).max())
        assert out.logdet == pytest.approx(logdet, rel=1e-11)


@pytest.mark.parametrize("groups", [1, 3])
@pytest.mark.parametrize("variant", ["error", "outcome"])
def test_the_one_state_filter_and_gradient_equal_the_two_state_code(variant, groups):
    """The two-state code on the one-rate state space is itself checked against statsmodels' filter
    (test_consolidation_kalman) and scipy's numerical derivatives (test_consolidation_gradient)."""
    prep = _prep(groups)
    for theta in THETAS:
        params = to_natural(theta, ONE_RATE)
        model, layout, padded = state_space(params, False), layout_for(prep, params, False), prep.padded[variant]
        ref = kalman_filter(model, layout, prep.y, prep.inputs[variant], prep.effects, padded, keep_work=True)
        ref_profile = profile_effects(ref, profile_scale=True)
        ref_grad = profile_gradient(model, layout, padded, ref, ref_profile,
                                    state_space_tangents(params, False, prep.hours))
        out, profile, grad = _one(prep, params, variant, gradient=True)
        np.testing.assert_allclose(out.gram, ref.gram, rtol=1e-10, atol=1e-12 * np.abs(ref.gram).max())
        assert out.logdet == pytest.approx(ref.logdet, rel=1e-12)
        np.testing.assert_allclose(out.end_means, ref.end_means, atol=1e-12)
        np.testing.assert_allclose(out.end_covs, ref.end_covs, atol=1e-12)
        assert profile.loglike == pytest.approx(ref_profile.loglike, rel=1e-12)
        np.testing.assert_allclose(grad, ref_grad, rtol=1e-8, atol=1e-9 * np.abs(ref_grad).max())
