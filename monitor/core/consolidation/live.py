"""A new trial updates the slow-state fraction without a refit: the exact filter, one trial at a time.

Rule: the parameters, the profiled effect sizes (offset, warm-up, drift) and the
noise scale are those of a cached fit and stay fixed; only the state moves.
Per trial at position j of its session the filter corrects the predicted state
with the observation y - effects(j) . coef, then predicts the next trial's state
with the trial's input (variant "error": -y; "outcome": rewarded * (y - running
mean of the earlier trials)); a session start applies the break's forgetting.
The state after a session's last trial is the batch filter's end state
(``consolidation_model.evaluate``) exactly.  Each update is O(1) (2x2 algebra).
Trials with a non-finite y are left out and counted; in warm-up "drop" mode the
first trials of a session are left out as in ``prepare``.  The interval is the
cached one (the last fitted session's distances below and above its estimate)
moved to the new point and clipped to [0, 1]; without a usable cached estimate
it is [0, 1] with the cached status.  A model figure, advisory only.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from monitor.core.consolidation.analysis import ConsolidationResult, Options
from monitor.core.consolidation.model import RUNNING_MEAN_TRIALS, TrialSeries, effect_rows, evaluate, prepare, state_space


@dataclass(frozen=True)
class LiveFraction:
    """The current slow-state fraction (after the latest trial) and its interval."""

    estimate: float
    low: float
    high: float
    status: str
    trials_since_fit: int


@dataclass(frozen=True)
class LiveSetup:
    """What a live filter needs from the cached fit (see :func:`live_filter`)."""

    params: dict[str, float]
    variant: str
    two_rate: bool
    coef: np.ndarray  # profiled effect sizes, in the order of ``effect_rows``
    scale: float  # noise scale r (every variance is relative to it)
    warmup: str = "model"
    warmup_trials: int = 5
    tau_w: tuple[float, ...] = (5.0, 25.0)
    drift: bool = True
    direction: float = 1.0  # sign of the learned change (as in consolidation_estimate)
    below: float = 1.0  # cached estimate - low (1: the interval reaches 0)
    above: float = 1.0  # cached high - estimate (1: the interval reaches 1)
    status: str = "not constrained"


class LiveFilter:
    """Exact Kalman filter at fixed parameters, fed one trial at a time."""

    def __init__(self, setup: LiveSetup, mean: np.ndarray | None = None, cov: np.ndarray | None = None,
                 running_mean: float | None = None):
        self.setup = setup
        model = state_space(setup.params, setup.two_rate)
        self._f, self._b, self._h = model.transition, model.input_gain, model.design
        self._q, self._r = model.state_cov * setup.scale, setup.scale
        self.mean = np.array(model.init_mean if mean is None else mean, float)
        self.cov = np.array(model.init_cov * setup.scale if cov is None else cov, float)
        self.running_mean = running_mean
        self.raw_position = 0  # trials seen in this session (all of them)
        self.position = 0  # trials of this session the filter used
        self.trials = 0  # trials used since the cached fit
        self.dropped = 0

    def start_session(self, break_hours: float) -> None:
        """A new session after ``break_hours`` (the fast state forgets, the slow one keeps)."""
        rho = math.exp(-float(break_hours) / self.setup.params["tau_b"]) if np.isfinite(break_hours) else 0.0
        d = np.diag([rho, 1.0 if self.setup.two_rate else 0.0])
        self.mean, self.cov = d @ self.mean, d @ self.cov @ d.T
        self.raw_position = self.position = 0

    def add_trial(self, y: float, rewarded: bool) -> None:
        """One trial's observation y = log(interval / target) and the rig's outcome."""
        raw, self.raw_position = self.raw_position, self.raw_position + 1
        if not np.isfinite(y):
            self.dropped += 1
            return
        if self.setup.warmup == "drop" and raw < self.setup.warmup_trials:
            return
        s = self.setup
        effect = float(effect_rows(np.array([self.position]), s.warmup, s.tau_w, s.drift)[:, 0] @ s.coef)
        h, p = self._h, self.cov
        ph = p @ h
        gain = ph / (h @ ph + self._r)
        innovation = y - effect - h @ self.mean
        filtered_mean = self.mean + gain * innovation
        filtered_cov = p - np.outer(gain, ph)
        if s.variant == "error":
            u = -y
        else:
            before = y if self.running_mean is None else self.running_mean
            u = float(rewarded) * (y - before)
        alpha = 1.0 / RUNNING_MEAN_TRIALS
        self.running_mean = y if self.running_mean is None else (1 - alpha) * self.running_mean + alpha * y
        self.mean = self._f @ filtered_mean + self._b * u
        self.cov = self._f @ filtered_cov @ self._f.T + self._q
        self.position += 1
        self.trials += 1

    def fraction(self) -> LiveFraction:
        """x_s / (x_f + x_s) of the current state, with the cached interval moved to it."""
        s = self.setup
        fast, slow = float(self.mean[0]), float(self.mean[1])
        total = fast + slow
        estimate = min(max(slow / total, 0.0), 1.0) if total * s.direction > 0 else 0.0
        low, high = max(estimate - s.below, 0.0), min(estimate + s.above, 1.0)
        return LiveFraction(estimate, low, high, s.status, self.trials)


def filter_state(live: LiveFilter) -> dict:
    """A JSON-ready dict of the filter (setup and state), to cache beside the fit."""
    s = live.setup
    return {"params": dict(s.params), "variant": s.variant, "two_rate": s.two_rate, "coef": s.coef.tolist(),
            "scale": s.scale, "warmup": s.warmup, "warmup_trials": s.warmup_trials, "tau_w": list(s.tau_w),
            "drift": s.drift, "direction": s.direction, "below": s.below, "above": s.above, "status": s.status,
            "mean": live.mean.tolist(), "cov": live.cov.tolist(), "running_mean": live.running_mean}


def restore_filter(state: dict) -> LiveFilter:
    """The filter `filter_state` described, ready for the next session."""
    setup = LiveSetup(dict(state["params"]), state["variant"], bool(state["two_rate"]), np.asarray(state["coef"], float),
                      float(state["scale"]), state["warmup"], int(state["warmup_trials"]), tuple(state["tau_w"]),
                      bool(state["drift"]), float(state["direction"]), float(state["below"]), float(state["above"]),
                      state["status"])
    return LiveFilter(setup, np.asarray(state["mean"], float), np.asarray(state["cov"], float), state["running_mean"])


def live_filter(series: TrialSeries, result: ConsolidationResult, options: Options = Options()) -> LiveFilter | None:
    """A live filter that continues after the last session of ``series``, from the fit in ``result``
    (one batch filter pass, no refit); None when the result has no two-rate fit."""
    fit = result.two_rate
    if fit is None or not result.sessions:
        return None
    prep = prepare(series, options.warmup, options.warmup_trials, options.tau_w, options.drift)
    ev = evaluate(prep, fit.params, fit.variant, fit.two_rate)
    learned = ev.end_means.sum(1)
    direction = float(np.sign(np.nanmedian(learned[-max(1, len(learned) // 3):])) or 1.0)
    last = result.sessions[-1]
    below, above = (last.estimate - last.low, last.high - last.estimate) if result.status == "estimated" else (1.0, 1.0)
    setup = LiveSetup(fit.params, fit.variant, fit.two_rate, ev.profiled.coef, ev.profiled.scale, options.warmup,
                      options.warmup_trials, options.tau_w, options.drift, direction, below, above, last.status)
    return LiveFilter(setup, ev.end_means[-1], ev.end_covs[-1], _ewm_last(prep.y))


def _ewm_last(y: np.ndarray) -> float | None:
    """The outcome variant's running mean after the last of these trials (None before any):
    m_0 = y_0, m_n = (1 - a) m_(n-1) + a y_n."""
    if len(y) == 0:
        return None
    alpha = 1.0 / RUNNING_MEAN_TRIALS
    weights = (1 - alpha) ** np.arange(len(y) - 2, -1, -1)
    return float((1 - alpha) ** (len(y) - 1) * y[0] + alpha * weights @ y[1:])
