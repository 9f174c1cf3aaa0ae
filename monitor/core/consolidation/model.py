"""Two-rate and one-rate learning models of a trial series, as linear-Gaussian state spaces.

Rule: per trial n (position j in its session) the observation is
y = log(interval / target), and
    y[n]      = b0 + x_f[n] + x_s[n] + sum_i w_i exp(-j / tau_w_i) + d (j / 300)^2 + e[n],  e ~ N(0, r)
    x_f[n+1]  = (a_f - c) x_f[n] + b_f u[n] + noise(q_f r)
    x_s[n+1]  = c x_f[n] + a_s x_s[n] + noise(q_s r)
    across a break of h hours before a session: x_f <- exp(-h / tau_b) x_f, x_s kept.
with warm-up time constants tau_w = (5, 25) trials and a within-session (satiety) drift d.  The fast state learns from the trial's result u[n] (variant "error": the signed
error -y[n]; variant "outcome": rewarded[n] * (y[n] - running mean of earlier y)),
the slow state is driven by repetition: it absorbs a share c of the fast state per
trial.  The one-rate model has x_s = 0: x[n+1] = a x[n] + b u[n] + noise.  Both
states start at 0 (a naive animal, offset b0).  b0, the w_i, d and r are profiled out
exactly; the other parameters are mapped from unbounded values by logistic
transforms onto meaningful ranges (table ``RANGES``).  Excluded sessions are
dropped and their breaks merged into the next session's break.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from monitor.core.consolidation.kalman import Layout, Padded, Profiled, StateSpace, kalman_filter, pad, profile_effects
from monitor.core.consolidation.kalman_one import one_state
from monitor.core.consolidation.kalman_tangent import Tangents, profile_gradient

VARIANTS = ("error", "outcome")
RUNNING_MEAN_TRIALS = 20.0  # time constant of the running mean the outcome variant compares with
DRIFT_TRIALS = 300.0  # scale of the within-session (satiety) drift term

# name -> (low, high, log-scale?)
RANGES: dict[str, tuple[float, float, bool]] = {
    "a_f": (0.3, 0.99995, False),  # fast retention per trial
    "b_f": (1e-4, 0.5, True),  # fast learning rate
    "c": (1e-6, 0.05, True),  # share of the fast state the slow state absorbs per trial
    "slow_leak": (1e-7, 0.01, True),  # 1 - a_s
    "tau_b": (0.5, 5000.0, True),  # hours over which the fast state forgets between sessions
    "q_f": (1e-7, 1.0, True),  # fast state noise / r
    "q_s": (1e-9, 0.1, True),  # slow state noise / r
}
TWO_RATE = ("a_f", "b_f", "c", "slow_leak", "tau_b", "q_f", "q_s")
ONE_RATE = ("a_f", "b_f", "tau_b", "q_f")


@dataclass(frozen=True)
class TrialSeries:
    """One animal's trials in time order (per-trial arrays) and its sessions (per-session arrays).

    ``session``: session label per trial (labels increase with time; each session's
    trials are contiguous).  ``y``: log(interval / target).  ``break_hours`` and
    ``excluded`` follow the sorted unique labels; break_hours[k] is the time since
    the previous session ended (ignored for the first).
    """

    session: np.ndarray
    y: np.ndarray
    rewarded: np.ndarray
    break_hours: np.ndarray
    excluded: np.ndarray
    interval_ms: np.ndarray | None = None

    @classmethod
    def from_intervals(
        cls,
        session: np.ndarray,
        interval_ms: np.ndarray,
        target_ms: np.ndarray,
        rewarded: np.ndarray,
        break_hours: np.ndarray,
        excluded: np.ndarray,
    ) -> "TrialSeries":
        interval = np.asarray(interval_ms, float)
        target = np.asarray(target_ms, float) * np.ones_like(interval)
        with np.errstate(divide="ignore", invalid="ignore"):
            y = np.log(interval / target)
        return cls(np.asarray(session), y, np.asarray(rewarded, bool), np.asarray(break_hours, float),
                   np.asarray(excluded, bool), interval)

    @property
    def labels(self) -> np.ndarray:
        return np.unique(self.session)


@dataclass(frozen=True)
class Prepared:
    """A series ready for the filter: included sessions only, warm-up handled."""

    labels: np.ndarray  # (S,) session labels kept
    layout_lengths: np.ndarray
    starts: np.ndarray
    hours: np.ndarray  # (S,) break before each kept session (merged over excluded ones)
    y: np.ndarray
    rewarded: np.ndarray
    inputs: dict[str, np.ndarray]
    padded: dict[str, Padded]
    effects: np.ndarray  # (E, T): offset, and warm-up when modelled
    dropped_trials: int  # non-finite observations left out
    warmup: str
    notes: list[str] = field(default_factory=list)

    @property
    def n_trials(self) -> int:
        return int(self.layout_lengths.sum())


def prepare(
    series: TrialSeries,
    warmup: str = "model",
    warmup_trials: int = 5,
    tau_w: tuple[float, ...] = (5.0, 25.0),
    drift: bool = True,
) -> Prepared:
    """Drop excluded sessions and non-finite trials; build inputs of both variants.

    warmup="model": warm-up terms w_i exp(-j/tau_w_i) in the observation (their sizes
    are profiled); warmup="drop": the first ``warmup_trials`` trials of each session are
    left out of the fit (the model then sees the session start after warm-up).
    ``drift``: a within-session term d (j / DRIFT_TRIALS)^2 (satiety: slower late in a
    session, back at the next session's start); its size is profiled.
    """
    session = np.asarray(series.session)
    y_all = np.asarray(series.y, float)
    rew_all = np.asarray(series.rewarded, bool)
    labels_all = np.unique(session)
    hours_all = np.asarray(series.break_hours, float)
    excl_all = np.asarray(series.excluded, bool)
    notes: list[str] = []
    order = np.argsort(session, kind="stable")
    if np.any(order != np.arange(len(order))):
        notes.append("trials re-ordered by session")
    session, y_all, rew_all = session[order], y_all[order], rew_all[order]
    sess_idx = np.searchsorted(labels_all, session)
    first = np.r_[True, sess_idx[1:] != sess_idx[:-1]]
    run_start = np.maximum.accumulate(np.where(first, np.arange(len(session)), 0))
    position = np.arange(len(session)) - run_start
    keep = np.isfinite(y_all) & ~excl_all[sess_idx]
    dropped = int(np.sum(~np.isfinite(y_all) & ~excl_all[sess_idx]))
    if warmup == "drop":
        keep &= position >= warmup_trials
    kept_sessions = np.unique(sess_idx[keep])
    # break before each kept session: its own plus those of excluded/empty sessions since the last kept one
    hours = np.nan_to_num(hours_all, nan=24.0)
    merged = np.empty(len(kept_sessions))
    prev = -1
    for i, k in enumerate(kept_sessions):
        merged[i] = hours[prev + 1 : k + 1].sum() if prev >= 0 else hours[k]
        prev = k
    y, rew = y_all[keep], rew_all[keep]
    sess_kept = sess_idx[keep]
    lengths = np.array([np.sum(sess_kept == k) for k in kept_sessions], dtype=np.intp)
    starts = np.r_[0, np.cumsum(lengths)[:-1]].astype(np.intp)
    inputs = {"error": -y, "outcome": rew * (y - _running_mean(y))}
    layout = Layout(starts, lengths, np.tile(np.eye(2), (len(lengths), 1, 1)))
    padded = {v: pad(layout, y, inputs[v]) for v in VARIANTS} if len(lengths) else {}
    t_max = int(lengths.max()) if len(lengths) else 1
    effects = effect_rows(np.arange(t_max), warmup, tau_w, drift)
    return Prepared(labels_all[kept_sessions], lengths, starts, merged, y, rew, inputs, padded,
                    effects, dropped, warmup, notes)


def effect_rows(position: np.ndarray, warmup: str, tau_w: tuple[float, ...], drift: bool) -> np.ndarray:
    """Observation regressors (E, len(position)) by position within the kept session: offset,
    warm-up terms (when modelled), drift (when asked); the order of the profiled coefficients."""
    position = np.asarray(position, float)
    rows = [np.ones_like(position)]
    if warmup == "model":
        rows += [np.exp(-position / tau) for tau in tau_w]
    if drift:
        rows.append((position / DRIFT_TRIALS) ** 2)
    return np.vstack(rows)


def _running_mean(y: np.ndarray) -> np.ndarray:
    """Exponentially weighted mean of the trials before each trial (first trial: itself)."""
    from scipy.signal import lfilter

    if len(y) == 0:
        return y
    alpha = 1.0 / RUNNING_MEAN_TRIALS
    ewm = lfilter([alpha], [1.0, -(1.0 - alpha)], y, zi=[(1.0 - alpha) * y[0]])[0]
    return np.r_[y[0], ewm[:-1]]


def to_natural(theta: np.ndarray, names: tuple[str, ...]) -> dict[str, float]:
    """Unbounded values -> parameters in their ranges (logistic, on a log scale where marked)."""
    out = {}
    for value, name in zip(np.asarray(theta, float).tolist(), names):
        low, high, log = RANGES[name]
        frac = 1.0 / (1.0 + math.exp(-value))
        value = math.exp(math.log(low) + frac * (math.log(high) - math.log(low))) if log else low + frac * (high - low)
        out[name] = min(max(value, low), high)
    return out


def natural_slopes(theta: np.ndarray, names: tuple[str, ...]) -> np.ndarray:
    """d(parameter)/d(theta) of :func:`to_natural`, per parameter."""
    out = []
    for value, name in zip(np.asarray(theta, float).tolist(), names):
        low, high, log = RANGES[name]
        frac = 1.0 / (1.0 + math.exp(-value))
        slope = frac * (1.0 - frac)
        if log:
            natural = math.exp(math.log(low) + frac * (math.log(high) - math.log(low)))
            out.append(natural * slope * (math.log(high) - math.log(low)))
        else:
            out.append(slope * (high - low))
    return np.array(out)


def to_theta(params: dict[str, float], names: tuple[str, ...]) -> np.ndarray:
    """Inverse of :func:`to_natural` (values clipped just inside their ranges)."""
    out = []
    for name in names:
        low, high, log = RANGES[name]
        v = float(params[name])
        frac = (np.log(v) - np.log(low)) / (np.log(high) - np.log(low)) if log else (v - low) / (high - low)
        frac = float(np.clip(frac, 1e-6, 1 - 1e-6))
        out.append(np.log(frac / (1 - frac)))
    return np.array(out)


def state_space(params: dict[str, float], two_rate: bool) -> StateSpace:
    """Matrices with variances relative to r (r = 1); see the module docstring."""
    a_f, b_f, q_f = params["a_f"], params["b_f"], params["q_f"]
    if two_rate:
        c, a_s, q_s = params["c"], 1.0 - params["slow_leak"], params["q_s"]
        f = np.array([[a_f - c, 0.0], [c, a_s]])
        q = np.diag([q_f, q_s])
        h = np.array([1.0, 1.0])
    else:
        f = np.array([[a_f, 0.0], [0.0, 0.0]])
        q = np.diag([q_f, 0.0])
        h = np.array([1.0, 0.0])
    return StateSpace(f, np.array([b_f, 0.0]), h, 1.0, q, np.zeros(2), q.copy())


def state_space_tangents(params: dict[str, float], two_rate: bool, hours: np.ndarray) -> Tangents:
    """Derivatives of :func:`state_space`'s matrices and :func:`layout_for`'s breaks with respect to
    each parameter, in the order of ``TWO_RATE`` / ``ONE_RATE``."""
    names = TWO_RATE if two_rate else ONE_RATE
    at = names.index
    d_f, d_b, d_q = np.zeros((len(names), 2, 2)), np.zeros((len(names), 2)), np.zeros((len(names), 2, 2))
    d_breaks = np.zeros((len(names), len(hours), 2, 2))
    d_f[at("a_f"), 0, 0] = 1.0
    d_b[at("b_f"), 0] = 1.0
    d_q[at("q_f"), 0, 0] = 1.0
    tau = params["tau_b"]
    d_breaks[at("tau_b"), :, 0, 0] = hours / tau**2 * np.exp(-hours / tau)
    if two_rate:
        d_f[at("c")] = [[-1.0, 0.0], [1.0, 0.0]]
        d_f[at("slow_leak"), 1, 1] = -1.0
        d_q[at("q_s"), 1, 1] = 1.0
    return Tangents(d_f, d_b, d_q, d_q.copy(), d_breaks)


def layout_for(prep: Prepared, params: dict[str, float], two_rate: bool) -> Layout:
    """Session layout with the break transitions of these parameters."""
    rho = np.exp(-prep.hours / params["tau_b"])
    breaks = np.zeros((len(rho), 2, 2))
    breaks[:, 0, 0] = rho
    breaks[:, 1, 1] = 1.0 if two_rate else 0.0
    return Layout(prep.starts, prep.layout_lengths, breaks)


@dataclass(frozen=True)
class Evaluation:
    """Likelihood and end-of-session states of one parameter vector."""

    profiled: Profiled
    end_means: np.ndarray  # (S, 2) with the profiled effects applied
    end_covs: np.ndarray  # (S, 2, 2) scaled by r


def evaluate(prep: Prepared, params: dict[str, float], variant: str, two_rate: bool) -> Evaluation:
    """Exact profile log-likelihood (b0, w, r profiled) and end states."""
    if two_rate:
        out = kalman_filter(state_space(params, True), layout_for(prep, params, True), prep.y, prep.inputs[variant],
                            prep.effects, prep.padded[variant])
    else:
        out = one_state(params["a_f"], params["b_f"], params["q_f"], prep.hours, params["tau_b"], prep.layout_lengths,
                        prep.padded[variant], prep.effects)
    prof = profile_effects(out, profile_scale=True)
    weights = np.r_[1.0, prof.coef]
    means = np.einsum("c,csa->sa", weights, out.end_means)
    return Evaluation(prof, means, out.end_covs * prof.scale)


def loglike_gradient(prep: Prepared, theta: np.ndarray, variant: str, two_rate: bool) -> tuple[float, np.ndarray]:
    """Exact profile log-likelihood and its gradient with respect to the transformed parameters (the one-rate
    model through its scalar filter, ``kalman_one``)."""
    names = TWO_RATE if two_rate else ONE_RATE
    params = to_natural(theta, names)
    if not two_rate:
        _, prof, grad = one_state(params["a_f"], params["b_f"], params["q_f"], prep.hours, params["tau_b"],
                                  prep.layout_lengths, prep.padded[variant], prep.effects, gradient=True)
        return prof.loglike, grad * natural_slopes(theta, names)
    model, layout, padded = state_space(params, two_rate), layout_for(prep, params, two_rate), prep.padded[variant]
    out = kalman_filter(model, layout, prep.y, prep.inputs[variant], prep.effects, padded, keep_work=True)
    prof = profile_effects(out, profile_scale=True)
    grad = profile_gradient(model, layout, padded, out, prof, state_space_tangents(params, two_rate, prep.hours))
    return prof.loglike, grad * natural_slopes(theta, names)


@dataclass(frozen=True)
class Simulated:
    """A simulated animal: its series and the true end-of-session states."""

    series: TrialSeries
    end_fast: np.ndarray  # (S,) after each session's last trial, before the break
    end_slow: np.ndarray

    @property
    def end_fraction(self) -> np.ndarray:
        total = self.end_fast + self.end_slow
        with np.errstate(divide="ignore", invalid="ignore"):
            return np.clip(self.end_slow / total, 0.0, 1.0)


def simulate(
    params: dict[str, float],
    lengths: np.ndarray,
    hours: np.ndarray,
    rng: np.random.Generator,
    variant: str = "error",
    offset: float = -0.8,
    warmup: float = 0.0,
    tau_w: float = 5.0,
    noise_sd: float = 0.15,
    tolerance: float = 0.2,
) -> Simulated:
    """Draw a series from the two-rate model (variances relative to noise_sd**2)."""
    r = noise_sd**2
    a_f, b_f, c = params["a_f"], params["b_f"], params["c"]
    a_s = 1.0 - params["slow_leak"]
    sd_f, sd_s = np.sqrt(params["q_f"] * r), np.sqrt(params["q_s"] * r)
    xf = xs = 0.0
    mean = None
    ys, rew, sess, ef, es = [], [], [], [], []
    for k, n in enumerate(lengths):
        if k:
            xf *= np.exp(-hours[k] / params["tau_b"])
        for j in range(int(n)):
            y = offset + xf + xs + warmup * np.exp(-j / tau_w) + rng.normal(0.0, noise_sd)
            hit = abs(np.exp(y) - 1.0) <= tolerance
            mean = y if mean is None else mean
            u = -y if variant == "error" else hit * (y - mean)
            mean += (y - mean) / RUNNING_MEAN_TRIALS
            xf, xs = (a_f - c) * xf + b_f * u + rng.normal(0.0, sd_f), c * xf + a_s * xs + rng.normal(0.0, sd_s)
            ys.append(y)
            rew.append(hit)
            sess.append(k + 1)
        ef.append(xf)
        es.append(xs)
    series = TrialSeries(np.array(sess), np.array(ys), np.array(rew), np.asarray(hours, float),
                         np.zeros(len(lengths), bool))
    return Simulated(series, np.array(ef), np.array(es))
