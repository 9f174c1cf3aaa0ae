"""Slow-state fraction per session with a 90 % interval, and a forecast in sessions.

Rule: the fraction at the end of a session is x_s / (x_f + x_s) of the filtered
state after the session's last trial (before the break), clipped to [0, 1].  The
figure stated and plotted is the median of the interval's draws (so it always
lies inside its band, never stretched to it); the interval propagates parameter uncertainty (draws from the Laplace approximation,
each run through the exact filter) and state uncertainty (draws from each
filtered end state's Gaussian); a draw whose learned change x_f + x_s points
against the animal's learning direction has no meaningful fraction and counts
half at 0 and half at 1, so it widens the interval.  The forecast runs each draw
forward at the animal's recent pace (median trials per session and break) with
the model's expected input (the warm-up term left out), and counts the sessions until the fraction first
reaches the level; the range is the 5th-95th percentile over draws.  When the stated figure is already at
the level the forecast names no count ("already above").
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from monitor.core.consolidation.fit import ModelFit, draw_thetas
from monitor.core.consolidation.model import ONE_RATE, TWO_RATE, Prepared, evaluate, state_space, to_natural
from monitor.core.consolidation.kalman import StateSpace

QUANTILES = (0.05, 0.95)


@dataclass(frozen=True)
class Fractions:
    """Per kept session: point estimate and 90 % interval of the slow-state fraction."""

    estimate: np.ndarray
    low: np.ndarray
    high: np.ndarray
    learned: np.ndarray  # x_f + x_s at the point estimate (the learned change, log units)
    draws_last: np.ndarray  # (draws, state draws, 2) end states of the last session (for the forecast)
    draw_params: list[dict[str, float]]


def _fraction(fast: np.ndarray, slow: np.ndarray, direction: float) -> np.ndarray:
    total = fast + slow
    with np.errstate(divide="ignore", invalid="ignore"):
        frac = np.clip(slow / total, 0.0, 1.0)
    return np.where(total * direction > 0, frac, np.nan)


def _quantiles_with_undefined(samples: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """5 %, 50 % and 95 % over axis 0; NaN samples count half at 0, half at 1."""
    filled = np.where(np.isnan(samples), 0.0, samples)
    nan_mask = np.isnan(samples)
    half = np.cumsum(nan_mask, axis=0) % 2 == 1
    filled = np.where(nan_mask & half, 1.0, filled)
    low, median, high = np.quantile(filled, (QUANTILES[0], 0.5, QUANTILES[1]), axis=0)
    return low, median, high


def slow_fractions(
    prep: Prepared, modes: list[ModelFit], rng: np.random.Generator, draws: int = 40, state_draws: int = 25
) -> Fractions:
    """Fractions for every kept session from two-rate fits (the best first, then other optima).

    Several optima of nearly equal likelihood share the draws equally: the
    interval is that of the mixture of their Laplace approximations.
    """
    best = modes[0]
    names = TWO_RATE if best.two_rate else ONE_RATE
    point = evaluate(prep, best.params, best.variant, best.two_rate)
    learned = point.end_means.sum(1)
    direction = float(np.sign(np.nanmedian(learned[-max(1, len(learned) // 3):])) or 1.0)
    samples, last_states, draw_params = [], [], []
    per_mode = max(1, draws // len(modes))
    for fit in modes:
        for theta in draw_thetas(fit, per_mode, rng):
            params = to_natural(theta, names)
            ev = evaluate(prep, params, fit.variant, fit.two_rate)
            vals, vecs = np.linalg.eigh(ev.end_covs)
            root = vecs * np.sqrt(np.maximum(vals, 0.0))[:, None, :]
            noise = rng.standard_normal((state_draws,) + ev.end_means.shape)
            z = ev.end_means[None] + np.einsum("sab,nsb->nsa", root, noise)
            samples.append(_fraction(z[..., 0], z[..., 1], direction))
            last_states.append(z[:, -1])
            draw_params.append(params | {"offset": float(ev.profiled.coef[0])})
    low, estimate, high = _quantiles_with_undefined(np.concatenate(samples))
    return Fractions(estimate, low, high, learned, np.stack(last_states), draw_params)


@dataclass(frozen=True)
class Forecast:
    """Sessions until the fraction reaches ``level`` (None = beyond the horizon)."""

    level: float
    sessions_low: int | None
    sessions_median: int | None
    sessions_high: int | None
    horizon: int
    trials_per_session: int
    break_hours: float
    reached: bool

    @property
    def summary(self) -> str:
        """One phrase that never names a level already passed: 'already above 0.80' when reached."""
        if self.reached:
            return f"already above {self.level:.2f}"
        if self.sessions_low is None:
            return f"{self.level:.2f} not within {self.horizon} sessions (model range)"
        high = "more than " + str(self.horizon) if self.sessions_high is None else str(self.sessions_high)
        span = str(self.sessions_low) if high == str(self.sessions_low) else f"{self.sessions_low}–{high}"
        return f"{self.level:.2f} in {span} more sessions (model range)"


def forecast(
    prep: Prepared, fit: ModelFit, fractions: Fractions, level: float = 0.8, horizon: int = 200, pace_sessions: int = 5
) -> Forecast:
    """Project every draw forward at the animal's recent pace with the expected closed-loop input."""
    n_future = int(np.median(prep.layout_lengths[-pace_sessions:]))
    hours = float(np.median(prep.hours[1:][-pace_sessions:])) if len(prep.hours) > 1 else 24.0
    if fractions.estimate[-1] >= level:  # the stated figure is at the level already: no count is named
        return Forecast(level, None, None, None, horizon, n_future, hours, True)
    slope, intercept = _input_feedback(prep, fit.variant, n_future)
    maps, consts = [], []
    for params, states in zip(fractions.draw_params, fractions.draws_last):
        model = state_space(params, two_rate=True)
        drive = model.input_gain * (intercept + slope * params["offset"])
        per_session, const = session_map(model, slope, drive, n_future)
        step = per_session @ np.diag([np.exp(-hours / params["tau_b"]), 1.0])  # the break, then a session
        maps.append(np.broadcast_to(step, (len(states), 2, 2)))
        consts.append(np.broadcast_to(const, (len(states), 2)))
    # every draw's state draws run forward together: x <- step x + const, session by session
    step, const = np.concatenate(maps), np.concatenate(consts)
    x = np.concatenate(list(fractions.draws_last))
    found = np.full(len(x), np.inf)
    for k in range(1, horizon + 1):
        x = np.einsum("nab,nb->na", step, x) + const
        total = x.sum(1)
        with np.errstate(divide="ignore", invalid="ignore"):
            frac = np.where(total != 0, x[:, 1] / total, 0.0)
        found = np.where(np.isinf(found) & (frac >= level), k, found)
        if np.all(np.isfinite(found)):
            break
    all_counts = np.minimum(found, horizon + 1)  # not reached: beyond the horizon
    qs = np.quantile(all_counts, (0.05, 0.5, 0.95))

    def as_int(v: float) -> int | None:
        return int(np.ceil(v)) if v <= horizon else None

    return Forecast(level, as_int(qs[0]), as_int(qs[1]), as_int(qs[2]), horizon, n_future, hours, False)


def session_map(model: StateSpace, slope: float, drive: np.ndarray, trials: int) -> tuple[np.ndarray, np.ndarray]:
    """x_end = Phi x_start + c over ``trials`` trials of the expected closed loop.

    With the input u = intercept + slope * (H x + offset) the state follows
    x' = (F + slope B H) x + drive, drive = B (intercept + slope * offset).
    """
    closed = model.transition + slope * np.outer(model.input_gain, model.design)
    augmented = np.eye(3)  # [[closed, drive], [0, 1]]: its power carries both Phi and c
    augmented[:2, :2], augmented[:2, 2] = closed, drive
    power = np.linalg.matrix_power(augmented, trials)
    return power[:2, :2], power[:2, 2]


def _input_feedback(prep: Prepared, variant: str, recent_trials: int) -> tuple[float, float]:
    """Expected input as a line in the output, u ~ intercept + slope * y (error variant: -y exactly)."""
    if variant == "error":
        return -1.0, 0.0
    y = prep.y[-5 * recent_trials:]
    u = prep.inputs[variant][-5 * recent_trials:]
    if len(y) < 3 or np.var(y) == 0:
        return 0.0, 0.0
    slope = float(np.cov(y, u)[0, 1] / np.var(y, ddof=1))
    return slope, float(np.mean(u) - slope * np.mean(y))
