"""The exact gradient of the profiled log-likelihood against scipy's numerical derivatives."""

from __future__ import annotations

from dataclasses import replace

import numpy as np
import pytest
from scipy.differentiate import jacobian
from scipy.optimize import approx_fprime

from monitor.core.consolidation.fit import default_starts
from monitor.core.consolidation.kalman import Layout, pad
from monitor.core.consolidation.model import (
    ONE_RATE,
    TWO_RATE,
    evaluate,
    loglike_gradient,
    natural_slopes,
    prepare,
    simulate,
    to_natural,
)

TRUTH = {"a_f": 0.95, "b_f": 0.05, "c": 1.2e-3, "slow_leak": 1e-5, "tau_b": 20.0, "q_f": 1e-3, "q_s": 1e-5}


def _prep(warmup: str = "model", drift: bool = True, groups: int = 1):
    """A short animal; its sessions laid out for the filter in ``groups`` length groups."""
    rng = np.random.default_rng(11)
    lengths = np.array([2, 150, 1, 90, 3, 210, 40, 120])  # short sessions: the covariance never settles
    sim = simulate(TRUTH, lengths, rng.choice([10.0, 22.0, 48.0, 70.0], len(lengths)), rng, warmup=-0.2)
    prep = prepare(sim.series, warmup=warmup, warmup_trials=1, drift=drift)
    layout = Layout(prep.starts, prep.layout_lengths, np.tile(np.eye(2), (len(lengths), 1, 1)))
    padded = {v: pad(layout, prep.y, prep.inputs[v], max_groups=groups, group_cost=0.0) for v in prep.padded}
    assert all(len(p.groups) == groups for p in padded.values())
    return replace(prep, padded=padded)


def _loglike(prep, variant: str, two_rate: bool):
    names = TWO_RATE if two_rate else ONE_RATE
    return lambda theta: evaluate(prep, to_natural(theta, names), variant, two_rate).profiled.loglike


def _vectorised(func):
    """scipy.differentiate calls f with x of shape (m, ...): one value per trailing index."""
    def call(x: np.ndarray) -> np.ndarray:
        flat = x.reshape(x.shape[0], -1)
        return np.array([func(flat[:, k]) for k in range(flat.shape[1])]).reshape(x.shape[1:])
    return call


@pytest.mark.slow
@pytest.mark.parametrize("groups", [1, 3])
@pytest.mark.parametrize("variant", ["error", "outcome"])
@pytest.mark.parametrize("two_rate", [True, False])
def test_gradient_matches_scipy_differentiate(variant, two_rate, groups):
    prep = _prep(groups=groups)
    starts = default_starts(two_rate, 3, np.random.default_rng(2))
    ll = _loglike(prep, variant, two_rate)
    for theta in starts:
        value, grad = loglike_gradient(prep, theta, variant, two_rate)
        assert value == pytest.approx(ll(theta), rel=1e-12)
        # scipy.differentiate.jacobian (scipy >= 1.15): central differences with Richardson extrapolation
        ref = jacobian(_vectorised(ll), theta, initial_step=1e-3).df
        np.testing.assert_allclose(grad, ref, rtol=1e-5, atol=1e-5 * np.abs(ref).max())


@pytest.mark.parametrize("warmup,drift", [("drop", True), ("model", False)])
def test_gradient_with_other_effects_matches_scipy_approx_fprime(warmup, drift):
    prep = _prep(warmup, drift)
    theta = default_starts(True, 2, np.random.default_rng(5))[1]
    ll = _loglike(prep, "error", True)
    _, grad = loglike_gradient(prep, theta, "error", True)
    # scipy.optimize.approx_fprime: plain forward differences (step 1e-6, truncation error ~ step * curvature)
    ref = approx_fprime(theta, ll, 1e-6)
    np.testing.assert_allclose(grad, ref, rtol=1e-3, atol=1e-4 * np.abs(ref).max())


def test_natural_slopes_match_scipy_approx_fprime():
    theta = np.linspace(-8.0, 8.0, len(TWO_RATE))
    slopes = natural_slopes(theta, TWO_RATE)
    for i, name in enumerate(TWO_RATE):
        # scipy.optimize.approx_fprime of to_natural along one coordinate
        ref = approx_fprime(theta[i : i + 1], lambda t: to_natural(np.r_[theta[:i], t, theta[i + 1 :]], TWO_RATE)[name],
                            1e-7 * max(1.0, abs(theta[i])))
        assert slopes[i] == pytest.approx(ref[0], rel=1e-5)


@pytest.mark.slow  # a numerical Hessian of a long series' likelihood
def test_laplace_hessian_matches_scipy_differentiate_hessian():
    from scipy.differentiate import hessian

    from monitor.core.consolidation.fit import Objective

    prep = _prep()
    theta = default_starts(True, 2, np.random.default_rng(7))[1]
    ours = Objective(prep, "error", True, None).hessian(theta)
    # scipy.differentiate.hessian (scipy >= 1.15): Richardson-extrapolated central differences of the
    # likelihood itself, from a step of 0.1 (smaller first steps lose the second difference to rounding:
    # the reason ours differences the exact gradient instead); ours is of the negative log-likelihood
    ll = _loglike(prep, "error", True)
    ref = -hessian(_vectorised(ll), theta, initial_step=0.1, maxiter=3).ddf
    np.testing.assert_allclose(ours, ref, rtol=2e-3, atol=5e-4 * np.abs(ref).max())
    # and the same for any step from 1e-2 to 1e-4 (no rounding plateau to choose)
    np.testing.assert_allclose(Objective(prep, "error", True, None).hessian(theta, 1e-2), ours, rtol=1e-3,
                               atol=1e-5 * np.abs(ours).max())
