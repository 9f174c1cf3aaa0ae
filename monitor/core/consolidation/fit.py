"""Maximum-likelihood fit of the learning models, with curvature-based parameter uncertainty.

Rule: the profile log-likelihood (offset, warm-up size and noise scale profiled
out exactly) is maximised over the transformed parameters by L-BFGS-B with
exact gradients (forward-mode tangents of the filter, ``kalman_tangent``), from
several starts (a warm start from a cached fit first when given); the best
optimum is kept.  Two shortcuts save evaluations without changing which
optimum wins: a run that comes within ``JOIN_DISTANCE`` of an optimum already
found stops (it is converging onto it), and raced starts (a few steps each) far
behind the best go no further.  A run's evaluations are capped at twice its
steps plus five (line searches that keep failing are not converging).  A fit
is "converged" when the optimiser reports success and the curvature (the
Hessian from central differences of the exact gradient) is that of a maximum;
otherwise the reason is kept.  Besides a central start and random ones,
``spread_starts`` gives a fixed, well-spread (scrambled Sobol) set over the
box that a search screens on the cheap likelihood (its global stage).  Before
its curvature is taken, an optimum is polished by Newton steps with that
Hessian, its flat directions (curvature below the floor) followed uphill to
where they stop rising, so that where a run happened to stop along them never
decides the answer.  Parameter uncertainty is the Laplace approximation
N(theta_hat, H^-1) on the transformed scale; flat directions get a floor
curvature so that their draws spread over the whole range (wide, never falsely
narrow).  Every likelihood evaluation checks the cancel callback.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Callable

import numpy as np

from monitor.core.consolidation.model import (
    ONE_RATE,
    TWO_RATE,
    Evaluation,
    Prepared,
    evaluate,
    loglike_gradient,
    to_natural,
    to_theta,
)

THETA_BOUND = 9.0  # transformed parameters stay in [-9, 9] (ranges' ends to within ~1e-4)
CURVATURE_FLOOR = 1e-2  # a flat direction still gets a variance of at most 100 on theta's scale
FTOL = 1e-8  # relative change of the objective at which L-BFGS-B stops by default (about 1e-4 units here)
JOIN_DISTANCE = 0.3  # a run this close to a known optimum is converging onto it
JOINED = "joined a known optimum"
POLISH_STEPS = 8  # Newton steps of a polish with one curvature (see polish)
POLISH_HALVINGS = 12  # a step is halved at most this often before the polish stops
POLISH_TOLERANCE = 1e-6  # a step shorter than this (max-norm on theta's scale) ends the polish
POLISH_ROUNDS = 10  # at most this many times the curvature is taken again where the steps ended
POLISH_GAIN = 1e-12  # a polish step must gain more than this, relative (evaluation noise is ~1e-15)
CURVATURE_MOVE = 1e-3  # steps that moved the optimum further (max-norm) take the curvature again


class Cancelled(Exception):
    """Raised inside a fit when the cancel callback says so."""


@dataclass(frozen=True)
class ModelFit:
    """One fitted model (variant x one/two-rate)."""

    variant: str
    two_rate: bool
    theta: np.ndarray
    params: dict[str, float]
    loglike: float
    n_params: int  # including the profiled offsets and noise scale (for AIC)
    converged: bool
    reason: str
    cov_theta: np.ndarray | None
    evaluations: int

    @property
    def aic(self) -> float:
        return 2.0 * self.n_params - 2.0 * self.loglike


class Objective:
    """Negative profile log-likelihood on the transformed scale, with a counter and cancel check."""

    def __init__(self, prep: Prepared, variant: str, two_rate: bool, cancel: Callable[[], bool] | None):
        self.prep, self.variant, self.two_rate, self.cancel = prep, variant, two_rate, cancel
        self.names = TWO_RATE if two_rate else ONE_RATE
        self.evaluations = 0

    def evaluate(self, theta: np.ndarray) -> Evaluation:
        if self.cancel is not None and self.cancel():
            raise Cancelled()
        self.evaluations += 1
        return evaluate(self.prep, to_natural(theta, self.names), self.variant, self.two_rate)

    def __call__(self, theta: np.ndarray) -> float:
        try:
            value = -self.evaluate(theta).profiled.loglike
        except (np.linalg.LinAlgError, FloatingPointError, ValueError):
            return 1e300
        return value if np.isfinite(value) else 1e300

    def value_and_grad(self, theta: np.ndarray) -> tuple[float, np.ndarray]:
        """Objective and its exact gradient (forward-mode tangents, ``kalman_tangent``): one evaluation."""
        if self.cancel is not None and self.cancel():
            raise Cancelled()
        self.evaluations += 1
        try:
            with np.errstate(all="ignore"):
                value, grad = loglike_gradient(self.prep, theta, self.variant, self.two_rate)
        except (np.linalg.LinAlgError, FloatingPointError, ValueError):
            return 1e300, np.zeros(len(theta))
        if not (np.isfinite(value) and np.all(np.isfinite(grad))):
            return 1e300, np.zeros(len(theta))
        return -value, -grad

    def hessian(self, theta: np.ndarray, step: float = 1e-3) -> np.ndarray:
        """Central differences of the exact gradient, symmetrised: 2p gradient evaluations."""
        p = len(theta)
        hess = np.empty((p, p))
        for i in range(p):
            t = np.array(theta, float)
            t[i] += step
            up = self.value_and_grad(t)
            t[i] -= 2 * step
            down = self.value_and_grad(t)
            if up[0] >= 1e300 or down[0] >= 1e300:
                hess[:, i] = np.nan
            else:
                hess[:, i] = (up[1] - down[1]) / (2 * step)
        return 0.5 * (hess + hess.T)


def default_starts(two_rate: bool, count: int, rng: np.random.Generator) -> list[np.ndarray]:
    """A fixed central start, then random starts spread over the transformed box."""
    if two_rate:
        base = to_theta({"a_f": 0.9, "b_f": 0.05, "c": 1e-3, "slow_leak": 1e-4, "tau_b": 24.0,
                         "q_f": 1e-3, "q_s": 1e-5}, TWO_RATE)
    else:
        base = to_theta({"a_f": 0.95, "b_f": 0.05, "tau_b": 24.0, "q_f": 1e-3}, ONE_RATE)
    starts = [base]
    if not two_rate:  # a slow, well-retained single process: where one-rate fits of long series end
        starts.append(to_theta({"a_f": 0.9995, "b_f": 0.002, "tau_b": 1000.0, "q_f": 1e-4}, ONE_RATE))
    for _ in range(max(count - len(starts), 0)):
        starts.append(np.clip(base + rng.normal(0.0, 1.5, len(base)), -THETA_BOUND + 1, THETA_BOUND - 1))
    return starts


def spread_starts(two_rate: bool, count: int, seed: int = 0, half_width: float = 6.0) -> list[np.ndarray]:
    """``count`` scrambled-Sobol points over [-half_width, half_width] per transformed parameter
    (deterministic for a seed): the global stage's candidates."""
    if count <= 0:
        return []
    from scipy.stats import qmc

    dims = len(TWO_RATE if two_rate else ONE_RATE)
    unit = qmc.Sobol(dims, scramble=True, seed=seed).random_base2(int(np.ceil(np.log2(count))))[:count]
    return list((2.0 * unit - 1.0) * half_width)


def fit_model(
    prep: Prepared,
    variant: str,
    two_rate: bool,
    starts: list[np.ndarray],
    optimise: int = 2,
    max_iter: int = 80,
    cancel: Callable[[], bool] | None = None,
    curvature: bool = True,
    known: tuple[np.ndarray, ...] = (),
    race: tuple[int, float] | None = None,
    ftol: float = FTOL,
) -> ModelFit:
    """Screen all starts by likelihood, optimise the best ``optimise`` of them, keep the best.

    ``race`` = (steps, margin): with several starts to optimise, each runs ``steps`` steps
    first and only those within ``margin`` log-likelihood of the best go on.

    With ``curvature`` the Laplace covariance is computed too (see :func:`with_curvature`).
    ``known``: optima already found (and those of earlier starts here); a run whose iterate
    comes within ``JOIN_DISTANCE`` of one (max-norm on the transformed scale) stops there,
    and when no other run is kept the fit carries the reason ``JOINED``.  ``ftol``: the relative change
    of the likelihood per step at which a run stops.
    """
    from scipy.optimize import minimize

    obj = Objective(prep, variant, two_rate, cancel)
    screened = sorted(starts, key=lambda t: obj(np.asarray(t, float))) if len(starts) > 1 else list(starts)
    best, best_joined = None, False
    bounds = [(-THETA_BOUND, THETA_BOUND)] * len(obj.names)
    joined: list[bool] = []

    def watch(xk: np.ndarray) -> None:
        if any(np.max(np.abs(xk - k)) < JOIN_DISTANCE for k in known):
            joined[-1] = True
            raise StopIteration

    def run(start: np.ndarray, steps: int):
        return minimize(obj.value_and_grad, np.asarray(start, float), jac=True, method="L-BFGS-B",
                        bounds=bounds, callback=watch if known else None,
                        options={"maxiter": steps, "maxfun": 2 * steps + 5, "ftol": ftol, "gtol": 1e-3})

    chosen = screened[:optimise]
    if race is not None and len(chosen) > 1:
        # every chosen start runs a few steps; those far behind the best then stop
        steps, margin = race
        raced = [run(start, steps) for start in chosen]
        top = min(r.fun for r in raced)
        chosen = [r.x for r in raced if r.fun - top < margin]
        max_iter = max(max_iter - steps, 1)
    for start in chosen:
        joined.append(False)
        res = run(start, max_iter)
        if best is None or (res.fun < best.fun and not joined[-1]) or best_joined:
            best, best_joined = res, joined[-1]
        if res.success and not joined[-1]:
            known = known + (np.asarray(res.x, float),)  # a later start that joins this optimum stops
    theta = np.asarray(best.x, float)
    loglike = -float(best.fun)
    converged, reason = bool(best.success) and np.isfinite(loglike), "" if best.success else str(best.message)
    if best_joined:
        converged, reason = False, JOINED
    if not (np.isfinite(loglike) and loglike > -1e299):
        converged, reason = False, "likelihood not finite"
    fit = ModelFit(variant, two_rate, theta, to_natural(theta, obj.names), loglike, len(obj.names) + prep.effects.shape[0] + 1,
                   converged, reason, None, obj.evaluations)
    return with_curvature(prep, fit, cancel) if curvature and converged else fit


def with_curvature(prep: Prepared, fit: ModelFit, cancel: Callable[[], bool] | None = None) -> ModelFit:
    """The fit polished (see :func:`polish`) with its Laplace covariance there; not converged when the
    curvature is not a maximum's."""
    obj = Objective(prep, fit.variant, fit.two_rate, cancel)
    hess = obj.hessian(fit.theta)
    theta, loglike = fit.theta, fit.loglike
    if np.all(np.isfinite(hess)):
        theta, value, hess = polish(obj, fit.theta, hess)
        loglike = max(loglike, -value)
    cov, problem = laplace_covariance(hess)
    converged = fit.converged and not problem
    reason = problem or fit.reason
    return ModelFit(fit.variant, fit.two_rate, theta, to_natural(theta, obj.names), loglike, fit.n_params,
                    converged, reason, cov, fit.evaluations + obj.evaluations)


def polish(obj: Objective, theta: np.ndarray, hess: np.ndarray) -> tuple[np.ndarray, float, np.ndarray]:
    """Newton steps from where a run stopped (``hess``: the curvature there), taken again with the
    curvature where they end until they no longer move; the point, its objective and its curvature.

    Along a direction with curvature below ``CURVATURE_FLOOR`` (a slow-state noise
    near zero, say) L-BFGS-B's steps, scaled by the stiff directions, gain almost
    nothing: a run stops (a step's gain below ``ftol``, or the gradient below gtol)
    anywhere on a ridge still rising by ~1e-4 units, where its route and the scipy
    release put it.  Each step here is Newton's in the curved directions and, in
    the flat ones, goes uphill (and both ways out of a saddle) as far as the box
    allows, the whole step halved until the objective falls; so every route ends
    where the ridge stops rising (often the box's end).  A parameter already at the
    box's end, the objective falling outwards, is held there (``_step_parts``).
    """
    theta = np.asarray(theta, float)
    value, grad = obj.value_and_grad(theta)
    for _ in range(POLISH_ROUNDS):
        polished, value, grad = _newton_steps(obj, theta, hess, value, grad)
        moved, theta = np.max(np.abs(polished - theta)) > CURVATURE_MOVE, polished
        if not moved:
            break
        hess = obj.hessian(theta)
        if not np.all(np.isfinite(hess)):
            break
    return theta, value, hess


def _newton_steps(obj: Objective, theta: np.ndarray, hess: np.ndarray, value: float,
                  grad: np.ndarray) -> tuple[np.ndarray, float, np.ndarray]:
    """Up to ``POLISH_STEPS`` steps of :func:`polish` with one curvature from ``theta`` (objective ``value``,
    gradient ``grad`` there); the point where they end, its objective and gradient."""
    hess = 0.5 * (hess + hess.T)
    for _ in range(POLISH_STEPS):
        newton, uphill = _step_parts(theta, hess, grad)
        reach = _reach(theta + newton, uphill)
        if reach == 0 and -0.5 * grad @ newton <= POLISH_GAIN * max(abs(value), 1.0):
            break  # Newton's alone, and its model gains less than a step must
        for halving in range(POLISH_HALVINGS + 1):
            trial = np.clip(theta + (newton + uphill * reach) * 0.5 ** halving, -THETA_BOUND, THETA_BOUND)
            trial_value = obj(trial)
            if trial_value < value - POLISH_GAIN * max(abs(value), 1.0):
                break
        else:
            break
        step, theta = np.max(np.abs(trial - theta)), trial
        value, grad = obj.value_and_grad(theta)
        if step < POLISH_TOLERANCE:
            break
    return theta, value, grad


def _step_parts(theta: np.ndarray, hess: np.ndarray, grad: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Newton's step in the curved directions and the way uphill (max-norm 1) in the flat ones, plus both
    ways out of a saddle along negative curvature, among the parameters not held at the box's end: one
    within ``POLISH_TOLERANCE`` of it with the likelihood rising outwards stays there, and the directions
    are those of the others' curvature (a flat direction that leans on a held parameter would otherwise
    be cut short by that parameter's last hair of room)."""
    held = (((theta <= -THETA_BOUND + POLISH_TOLERANCE) & (grad > 0))
            | ((theta >= THETA_BOUND - POLISH_TOLERANCE) & (grad < 0)))
    newton, uphill = np.zeros(len(theta)), np.zeros(len(theta))
    free = ~held
    if not free.any():
        return newton, uphill
    vals, vecs = np.linalg.eigh(hess[np.ix_(free, free)])
    slope = grad[free]
    curved, flat = vecs[:, vals >= CURVATURE_FLOOR], vecs[:, vals < CURVATURE_FLOOR]
    bent = vecs[:, vals < -CURVATURE_FLOOR]  # negative curvature: rising both ways (a saddle)
    newton[free] = -(curved / vals[vals >= CURVATURE_FLOOR]) @ (curved.T @ slope)
    up = -flat @ (flat.T @ slope)
    size = np.max(np.abs(up), initial=0.0)
    uphill[free] = (up / size if size > 0 else up) + bent @ np.where(bent.T @ slope > 0, -1.0, 1.0)
    return newton, uphill


def _reach(theta: np.ndarray, direction: np.ndarray) -> float:
    """How far along ``direction`` from ``theta`` the box ends (at most its width, in max-norm)."""
    size = np.max(np.abs(direction))
    if size == 0.0:
        return 0.0
    room = np.where(direction > 0, THETA_BOUND - theta, -THETA_BOUND - theta)
    moving = np.abs(direction) > 1e-12 * size
    return float(min(np.min(np.maximum(room[moving] / direction[moving], 0.0)), 2 * THETA_BOUND / size))


def laplace_covariance(hess: np.ndarray) -> tuple[np.ndarray, str]:
    """Inverse curvature with a floor on flat directions; a reason when it is not a maximum."""
    sym = 0.5 * (hess + hess.T)
    if not np.all(np.isfinite(sym)):
        return np.eye(len(sym)) / CURVATURE_FLOOR, "curvature not finite"
    vals, vecs = np.linalg.eigh(sym)
    reason = ""
    if vals.min() < -0.05 * max(abs(vals).max(), 1.0):
        reason = "not at a maximum (negative curvature)"
    vals = np.maximum(vals, CURVATURE_FLOOR)
    return (vecs / vals) @ vecs.T, reason


def draw_thetas(fit: ModelFit, count: int, rng: np.random.Generator) -> np.ndarray:
    """Parameter draws from the Laplace approximation, kept inside the transformed box."""
    cov = fit.cov_theta if fit.cov_theta is not None else np.eye(len(fit.theta)) / CURVATURE_FLOOR
    cov = 0.5 * (cov + cov.T)
    try:  # the Cholesky factor is unique and continuous in cov: nearly equal fits give nearly equal draws
        root = np.linalg.cholesky(cov)
    except np.linalg.LinAlgError:
        vals, vecs = np.linalg.eigh(cov)
        root = vecs * np.sqrt(np.maximum(vals, 0.0))
    draws = fit.theta + rng.standard_normal((count, len(fit.theta))) @ root.T
    return np.clip(draws, -THETA_BOUND, THETA_BOUND)
