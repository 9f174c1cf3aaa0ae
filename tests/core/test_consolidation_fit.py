"""Search shortcuts of the fitter: a run that joins a known optimum stops; a raced start far behind is dropped;
the one-rate model compared is still at its maximum; the polish ends every route along a flat ridge at one point."""

from __future__ import annotations

import numpy as np
import pytest

from monitor.core.consolidation.fit import JOINED, default_starts, fit_model
from monitor.core.consolidation.model import prepare, simulate

TRUTH = {"a_f": 0.95, "b_f": 0.05, "c": 1.2e-3, "slow_leak": 1e-5, "tau_b": 20.0, "q_f": 1e-3, "q_s": 1e-5}


@pytest.fixture(scope="module")
def prep():
    rng = np.random.default_rng(4)
    lengths = rng.integers(60, 80, 6)
    return prepare(simulate(TRUTH, lengths, rng.choice([22.0, 48.0, 70.0], 6), rng, warmup=-0.2).series)


def test_a_run_that_reaches_a_known_optimum_stops_there(prep):
    start = default_starts(False, 1, np.random.default_rng(0))[0]
    full = fit_model(prep, "error", False, [start], 1, 150, None, False)
    assert full.converged, full.reason
    joined = fit_model(prep, "error", False, [start], 1, 150, None, False, known=(full.theta,))
    assert joined.reason == JOINED and not joined.converged
    assert joined.evaluations < full.evaluations
    assert np.max(np.abs(joined.theta - full.theta)) < 0.3


@pytest.mark.slow
def test_race_keeps_the_best_and_never_loses_to_the_plain_multistart(prep):
    starts = default_starts(False, 4, np.random.default_rng(1))
    plain = fit_model(prep, "error", False, starts, 2, 150, None, False)
    raced = fit_model(prep, "error", False, starts, 2, 150, None, False, race=(5, 50.0))
    assert raced.converged, raced.reason
    assert raced.loglike >= plain.loglike - 1e-3


@pytest.mark.slow
def test_the_one_rate_model_compared_is_at_its_maximum():
    """Only the chosen variant's one-rate model goes on from its race to convergence: its optimum must be
    one that scipy's Nelder-Mead (likelihood values only, none of our gradient code) cannot raise by more
    than 0.05 log-likelihood units (well inside the AIC margin)."""
    from scipy.optimize import minimize

    from monitor.core.consolidation.analysis import Options, estimate_consolidation
    from monitor.core.consolidation.fit import Objective

    rng = np.random.default_rng(7)
    series = simulate(TRUTH, rng.integers(120, 160, 8), rng.choice([22.0, 48.0, 70.0], 8), rng, warmup=-0.2).series
    options = Options(min_trials=500, draws=8, state_draws=8)
    res = estimate_consolidation(series, options)
    one = res.one_rate
    assert one is not None and one.variant == res.two_rate.variant
    objective = Objective(prepare(series), one.variant, False, None)
    theta = one.theta
    assert -objective(theta) == pytest.approx(one.loglike, abs=1e-6)
    polished = minimize(objective, theta, method="Nelder-Mead",
                        options={"xatol": 1e-6, "fatol": 1e-9, "maxfev": 4000, "initial_simplex":
                                 theta + np.vstack([np.zeros(4), 0.05 * np.eye(4)])})
    assert -polished.fun - one.loglike <= 0.05


class _Ridge:
    """A stand-in objective with the shape of a slow-state noise near zero: a straight valley (curvatures
    1e4, 50 and 2 across it) whose floor still falls by ``b * exp(t)`` towards t = -9, the box's end."""

    curvatures = np.array([1e4, 50.0, 2.0])
    centre = np.array([2.1, 1.4, 0.6])
    slope = np.array([1e-3, -2e-3, 5e-3])  # the valley's floor moves with t: a ridge not along an axis
    b = 5e-3

    def _parts(self, theta: np.ndarray) -> tuple[np.ndarray, float]:
        return theta[:3] - self.centre - self.slope * theta[3], float(theta[3])

    def __call__(self, theta: np.ndarray) -> float:
        offset, t = self._parts(theta)
        return float(0.5 * offset @ (self.curvatures * offset) + self.b * np.exp(t))

    def value_and_grad(self, theta: np.ndarray) -> tuple[float, np.ndarray]:
        offset, t = self._parts(theta)
        across = self.curvatures * offset
        return self(theta), np.append(across, -self.slope @ across + self.b * np.exp(t))

    def hessian(self, theta: np.ndarray) -> np.ndarray:
        jac = np.hstack([np.eye(3), -self.slope[:, None]])  # d(offset)/d(theta)
        hess = jac.T @ (self.curvatures[:, None] * jac)
        hess[3, 3] += self.b * np.exp(theta[3])
        return hess

    def at(self, t: float, nudge: float) -> np.ndarray:
        return np.append(self.centre + self.slope * t + nudge / self.curvatures, t)


@pytest.mark.parametrize("t, nudge", [(-3.6, 1e-3), (-7.8, -1e-3), (-9.0, 5e-4)])
def test_the_polish_ends_every_route_at_the_end_of_a_flat_ridge(t, nudge):
    """Where a run stopped along a ridge flatter than the curvature floor (gradient below L-BFGS-B's gtol)
    must not decide where the fit ends.  Check value: the ridge's minimum in the box is known in closed form
    (t at the box's end, the valley's floor there; common practice)."""
    from monitor.core.consolidation.fit import THETA_BOUND, polish

    ridge = _Ridge()
    start = ridge.at(t, nudge)
    theta, value, _ = polish(ridge, start, ridge.hessian(start))
    expected = np.append(ridge.centre - ridge.slope * THETA_BOUND, -THETA_BOUND)
    assert np.max(np.abs(theta - expected)) < 1e-6, theta - expected
    assert value == pytest.approx(ridge(expected), abs=1e-12) and value <= ridge(start)


class _TwoFlat:
    """A stand-in objective 5e3 x^2 + b exp(t1) + b exp(t2): two flat directions falling towards the box's end,
    the way two state noises near zero do."""

    b = 5e-3

    def __call__(self, theta: np.ndarray) -> float:
        x, t1, t2 = theta
        return float(5e3 * x**2 + self.b * (np.exp(t1) + np.exp(t2)))

    def value_and_grad(self, theta: np.ndarray) -> tuple[float, np.ndarray]:
        x, t1, t2 = theta
        return self(theta), np.array([1e4 * x, self.b * np.exp(t1), self.b * np.exp(t2)])

    def hessian(self, theta: np.ndarray) -> np.ndarray:
        return np.diag([1e4, self.b * np.exp(theta[1]), self.b * np.exp(theta[2])])


def test_a_flat_direction_that_leans_on_a_parameter_at_its_end_still_moves_the_others():
    """One flat parameter a hair from the box's end, another with room: the step uphill must not shrink to
    that hair.  Check value: both exponentials fall towards -9, so the minimum in the box is x = 0 at
    t1 = t2 = -9 (common practice)."""
    from monitor.core.consolidation.fit import THETA_BOUND, polish

    flat = _TwoFlat()
    start = np.array([1e-4, -THETA_BOUND + 2e-7, -7.63])
    theta, value, _ = polish(flat, start, flat.hessian(start))
    assert np.max(np.abs(theta - [0.0, -THETA_BOUND, -THETA_BOUND])) < 1e-6, theta
    assert value == pytest.approx(flat(np.array([0.0, -THETA_BOUND, -THETA_BOUND])), abs=1e-12)


class _Saddle:
    """A stand-in objective 25 x^2 - y^2 / 4 + y^4 / 4: a saddle at the origin, minima at y = +-sqrt(1/2)."""

    def __call__(self, theta: np.ndarray) -> float:
        x, y = theta
        return float(25.0 * x**2 - 0.25 * y**2 + 0.25 * y**4)

    def value_and_grad(self, theta: np.ndarray) -> tuple[float, np.ndarray]:
        x, y = theta
        return self(theta), np.array([50.0 * x, -0.5 * y + y**3])

    def hessian(self, theta: np.ndarray) -> np.ndarray:
        return np.diag([50.0, -0.5 + 3.0 * theta[1] ** 2])


def test_the_polish_leaves_a_saddle_where_a_run_stopped():
    """A run can stop where the gradient vanishes but the curvature is negative along one direction.
    Check value: the minima of x^2 and y^4 / 4 - y^2 / 4 in closed form (common practice)."""
    from monitor.core.consolidation.fit import polish

    saddle = _Saddle()
    start = np.array([2e-5, 0.0])
    theta, value, hess = polish(saddle, start, saddle.hessian(start))
    assert abs(theta[0]) < 1e-6 and abs(abs(theta[1]) - np.sqrt(0.5)) < 1e-6, theta
    assert value == pytest.approx(-1.0 / 16.0, abs=1e-12)
    assert np.all(np.linalg.eigvalsh(hess) > 0)  # the curvature returned is the minimum's
