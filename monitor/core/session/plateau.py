"""Plateau criteria on a learning curve of the final stage (docs/analysis.md).

Rule: every rule takes a `LearningCurve` (one stage, one measure, sessions
with at least min_trials trials, excluded sessions already left out) and
returns a `PlateauResult`: reached or not, the plateau session's index (from
1), the figures, and one sentence saying why. "Meets the threshold" means
value >= threshold for hit_rate and fixed_window_fraction and value <=
threshold for median_abs_log_error and cv; equality meets it.
- consecutive_sessions: the first of the first run of `sessions` curve
  sessions that all meet the threshold.
- change_point: Gallistel, Fairhurst & Balsam (2004) on the trial-by-trial
  cumulative record; reached when the last change point is a rise and the
  record has held without a further change for `sessions` sessions; the plateau
  session holds the first trial after that change point.
- slope: the first window of `window` sessions whose least-squares slope has a
  `confidence` interval containing 0 and |slope| <= max_slope (and whose mean
  meets the threshold when one is set); the plateau session opens the window.
- asymptote_fraction: y = a - (a - y0) exp(-n / tau) fitted over the sessions
  (n = 0, 1, ...); the plateau session is the first with n >= tau ln(1/(1-q)).
`learning_trial` is Smith et al. (2004)'s state-space estimate of the first
trial after which performance stays above chance (P >= 0.95): a marker of
"learned", not of plateau. scipy is imported only inside the functions.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any, NamedTuple

import numpy as np

from monitor.core.protocol import BINARY_MEASURES, HIGHER_IS_BETTER, RULES, PlateauRule, TrainingProtocol
from monitor.core.session.summary import LearningCurve

LN10 = math.log(10.0)


class PlateauResult(NamedTuple):
    rule: str
    reached: bool
    session: int | None
    figures: dict[str, Any]
    reason: str


def _meets(value: float, threshold: float, higher: bool) -> bool:
    return value >= threshold if higher else value <= threshold


def _fmt(value: float) -> str:
    return f"{value:.3g}"


MEASURE_WORDS = {"hit_rate": "hit rate", "fixed_window_fraction": "fraction in the fixed window",
                 "median_abs_log_error": "interval error (median |ln(interval ÷ target)|)", "cv": "CV"}


def _words(measure: str) -> str:
    """A measure's name as a person reads it (reasons are shown on screen and in reports)."""
    return MEASURE_WORDS.get(measure, measure.replace("_", " "))


def _sessions(n: int) -> str:
    return "1 session" if n == 1 else f"{n} sessions"


# -- consecutive sessions ----------------------------------------------------

def consecutive_sessions(curve: LearningCurve, threshold: float, sessions: int) -> PlateauResult:
    """The first run of `sessions` sessions meeting `threshold`."""
    higher = HIGHER_IS_BETTER[curve.measure]
    sign = "at or above" if higher else "at or below"
    run: list[int] = []
    for point in curve.points:
        run = run + [point.session] if _meets(point.value, threshold, higher) else []
        if len(run) == sessions:
            figures = {"threshold": threshold, "sessions": list(run),
                       "values": [p.value for p in curve.points if p.session in run]}
            return PlateauResult("consecutive_sessions", True, run[0], figures,
                                 f"{_words(curve.measure)} {sign} {_fmt(threshold)} in {sessions} consecutive sessions "
                                 f"from session {run[0]} to {run[-1]}.")
    best = len(run)
    return PlateauResult("consecutive_sessions", False, None, {"threshold": threshold, "current_run": best},
                         f"{_words(curve.measure)} has not been {sign} {_fmt(threshold)} in {sessions} consecutive "
                         f"sessions of stage {curve.stage} yet (so far {_sessions(best)} in a row).")


# -- change point (Gallistel, Fairhurst & Balsam 2004) ------------------------

class ChangePoint(NamedTuple):
    trial: int  # the last trial before the change (1-based count of trials)
    detected_at: int  # the trial at which |L| first exceeded the criterion
    log_odds: float  # L = log10(P(X <= k) / P(X >= k)) at detection
    rate_before: float
    rate_after: float


def _log_odds(k: np.ndarray, n: np.ndarray, p: np.ndarray) -> np.ndarray:
    """log10(P(X <= k) / P(X >= k)) for X ~ Binomial(n, p), from the regularised incomplete beta
    function (scipy.special; scipy.stats would cost the commands two seconds of import)."""
    from scipy.special import bdtr, bdtrc  # lazy

    k = np.rint(k).astype(np.int64)  # counts: bdtr wants integer arguments
    n = np.rint(n).astype(np.int64)
    with np.errstate(divide="ignore", invalid="ignore"):
        at_most = bdtr(k, n, p)
        at_least = np.where(k >= 1, bdtrc(np.maximum(k - 1, 0), n, p), 1.0)
        value = (np.log(at_most) - np.log(at_least)) / LN10
    return np.where(np.isnan(value), 0.0, value)


FIRST_BLOCK = 32  # trials scored at once after a restart of the change-point search (then doubling)


class _RecordHull:
    """Upper and lower convex hulls of the cumulative record (n, C(n)) from an origin.

    The candidate change point for the chord to trial t is the hull vertex
    farthest from the chord (the first such trial on a tie), found by binary
    search; points are added in order, so building costs O(1) amortised and
    each query O(log n). Integer arithmetic throughout: ties are exact.
    """

    def __init__(self, cum: list[int], origin: int) -> None:
        self.cum, self.origin = cum, origin
        self.upper: list[int] = []
        self.lower: list[int] = []
        self.last = origin - 1

    def candidates(self, first: int, last: int) -> list[int]:
        """The candidate change point for each chord to t = first..last (the hull grows to `last`)."""
        c, o = self.cum, self.origin
        upper, lower = self.upper, self.lower
        out: list[int] = []
        for t in range(first, last + 1):
            for n in range(self.last + 1, t + 1):  # add the points up to t
                cn = c[n]
                while len(upper) >= 2:
                    p, q = upper[-2], upper[-1]
                    if (q - p) * (cn - c[p]) - (c[q] - c[p]) * (n - p) >= 0:
                        upper.pop()
                    else:
                        break
                upper.append(n)
                while len(lower) >= 2:
                    p, q = lower[-2], lower[-1]
                    if (q - p) * (cn - c[p]) - (c[q] - c[p]) * (n - p) <= 0:
                        lower.pop()
                    else:
                        break
                lower.append(n)
            if t > self.last:
                self.last = t
            num, den = c[t] - c[o], t - o
            lo, hi = 0, len(upper) - 1  # first upper vertex whose next edge is no steeper than the chord
            while lo < hi:
                mid = (lo + hi) // 2
                u, v = upper[mid], upper[mid + 1]
                if (c[v] - c[u]) * den <= num * (v - u):
                    hi = mid
                else:
                    lo = mid + 1
            top = upper[lo]
            lo, hi = 0, len(lower) - 1  # first lower vertex whose next edge is no shallower than the chord
            while lo < hi:
                mid = (lo + hi) // 2
                u, v = lower[mid], lower[mid + 1]
                if (c[v] - c[u]) * den >= num * (v - u):
                    hi = mid
                else:
                    lo = mid + 1
            bottom = lower[lo]
            above = (c[top] - c[o]) * den - (top - o) * num
            below = (bottom - o) * num - (c[bottom] - c[o]) * den
            out.append(min(top, bottom) if above == below else top if above > below else bottom)
        return out


def change_points(outcomes: Sequence[bool] | np.ndarray, crit: float, chunk: int = 512) -> list[ChangePoint]:
    """Change points of a binary series by Gallistel et al.'s cumulative-record test.

    From origin r0, at each trial t the candidate r maximises the distance of
    the cumulative record C(n) from the chord joining (r0, C(r0)) and (t, C(t)).
    Under a constant rate the C(t) - C(r0) successes fall after r with
    probability (t - r) / (t - r0) each; L = log10(P(X <= k) / P(X >= k)) for the
    k successes seen after r. A change is accepted at the first t where
    |L| > crit, and the search restarts from r. The trials are scored in
    blocks that start at `FIRST_BLOCK` after each restart and double up to
    `chunk` (a change often follows soon after the last one: less is scored
    past it); the blocks do not change the result.
    """
    x = np.asarray(outcomes, dtype=bool)
    cum_list = [0] + np.cumsum(x, dtype=np.int64).tolist()
    cum = np.array(cum_list, dtype=float)
    total = len(x)
    found: list[ChangePoint] = []
    origin, t_next = 0, 1
    hull = _RecordHull(cum_list, origin)
    block = min(FIRST_BLOCK, chunk)
    while t_next <= total:
        stop = min(total, t_next + block - 1)
        block = min(2 * block, chunk)
        ts = np.arange(t_next, stop + 1)
        cands = np.array(hull.candidates(t_next, stop), dtype=np.int64)
        after_n = ts - cands
        after_k = cum[ts] - cum[cands]
        successes = cum[ts] - cum[origin]
        valid = (cands > origin) & (after_n > 0)
        scores = np.where(valid, _log_odds(after_k, successes, after_n / (ts - origin)), 0.0)
        hits = np.nonzero(np.abs(scores) > crit)[0]
        if len(hits) == 0:
            t_next = stop + 1
            continue
        i = int(hits[0])
        t, r = int(ts[i]), int(cands[i])
        before = (cum[r] - cum[origin]) / (r - origin)
        found.append(ChangePoint(r, t, float(scores[i]), float(before), float(after_k[i] / after_n[i])))
        origin, t_next = r, t + 1
        hull = _RecordHull(cum_list, origin)  # grows to the next block's trials as they are asked
        block = min(FIRST_BLOCK, chunk)
    return found


def change_point(curve: LearningCurve, crit: float, sessions: int) -> PlateauResult:
    """Plateau when the last change point is a rise that has held for `sessions` sessions."""
    if curve.measure not in BINARY_MEASURES:
        return PlateauResult("change_point", False, None, {},
                             f"the change-point rule needs a trial-by-trial measure, not {_words(curve.measure)}.")
    if not curve.points:
        return PlateauResult("change_point", False, None, {}, f"no sessions of stage {curve.stage} to judge.")
    series = np.concatenate([p.outcomes for p in curve.points])
    owner = np.concatenate([np.full(len(p.outcomes), p.session) for p in curve.points])
    found = change_points(series, crit)
    def session_after(trial: int) -> int:
        return int(owner[min(trial, len(series) - 1)])

    figures: dict[str, Any] = {"crit": crit, "trials": len(series),
                               "change_points": [{"trial": c.trial, "session": session_after(c.trial),
                                                  "rate_before": c.rate_before, "rate_after": c.rate_after,
                                                  "log_odds": c.log_odds} for c in found]}
    if not found:
        return PlateauResult("change_point", False, None, figures,
                             f"no change in {_words(curve.measure)} detected at |L| > {_fmt(crit)} over {len(series)} trials.")
    last = found[-1]
    start = session_after(last.trial)
    held = [p.session for p in curve.points if p.session >= start]
    tail_rate = float(series[last.trial:].mean())
    figures.update(rate_after=tail_rate, sessions_since=len(held))
    if last.rate_after <= last.rate_before:
        return PlateauResult("change_point", False, None, figures,
                             f"the last change (trial {last.trial}) is a drop from {_fmt(last.rate_before)} "
                             f"to {_fmt(last.rate_after)}.")
    if len(held) < sessions:
        return PlateauResult("change_point", False, None, figures,
                             f"{_words(curve.measure)} rose to {_fmt(tail_rate)} at trial {last.trial} (session {start}) "
                             f"but has held for {len(held)} of the {sessions} sessions needed.")
    return PlateauResult("change_point", True, start, figures,
                         f"{_words(curve.measure)} rose from {_fmt(last.rate_before)} to {_fmt(tail_rate)} at trial "
                         f"{last.trial} (session {start}) and has held without a further change for {len(held)} "
                         f"sessions.")


# -- slope over the last W sessions --------------------------------------------

def _slope(x: np.ndarray, y: np.ndarray, confidence: float) -> tuple[float, float, float]:
    from scipy.special import stdtrit  # lazy: the t quantile without scipy.stats's import

    xm = x - x.mean()
    sxx = float(xm @ xm)
    slope = float(xm @ (y - y.mean())) / sxx
    resid = y - y.mean() - slope * xm
    se = math.sqrt(float(resid @ resid) / (len(x) - 2) / sxx)
    half = float(stdtrit(len(x) - 2, 0.5 + confidence / 2)) * se
    return slope, slope - half, slope + half


def slope(curve: LearningCurve, window: int, max_slope: float, confidence: float,
          threshold: float | None = None) -> PlateauResult:
    """The first window of `window` sessions with a flat slope (CI holds 0, |slope| <= max_slope)."""
    higher = HIGHER_IS_BETTER[curve.measure]
    points = curve.points
    last: dict[str, Any] = {}
    for start in range(len(points) - window + 1):
        chunk = points[start : start + window]
        x = np.array([p.session for p in chunk], float)
        y = np.array([p.value for p in chunk], float)
        value, low, high = _slope(x, y, confidence)
        level = float(y.mean())
        last = {"slope": value, "low": low, "high": high, "mean": level, "window": window,
                "sessions": [p.session for p in chunk]}
        flat = low <= 0 <= high and abs(value) <= max_slope
        if flat and (threshold is None or _meets(level, threshold, higher)):
            return PlateauResult("slope", True, chunk[0].session, last,
                                 f"over sessions {chunk[0].session}-{chunk[-1].session} the slope of {_words(curve.measure)} "
                                 f"is {_fmt(value)} per session ({confidence:.0%} CI {_fmt(low)} to {_fmt(high)}), "
                                 f"flat within {_fmt(max_slope)}, at a mean of {_fmt(level)}.")
    if len(points) < window:
        return PlateauResult("slope", False, None, last,
                             f"{len(points)} sessions of stage {curve.stage}, fewer than the window of {window}.")
    return PlateauResult("slope", False, None, last,
                         f"no window of {window} sessions has a slope of {_words(curve.measure)} flat within "
                         f"{_fmt(max_slope)} per session" + ("" if threshold is None else
                                                             f" at a mean meeting {_fmt(threshold)}")
                         + f" (last: {_fmt(last['slope'])}, CI {_fmt(last['low'])} to {_fmt(last['high'])}).")


# -- fraction of the fitted asymptote -----------------------------------------

class ExponentialFit(NamedTuple):
    a: float  # asymptote
    y0: float  # value at n = 0
    tau: float
    rss: float
    at_bound: bool  # tau hit the search range: the data show no curvature


def _linear_part(x: np.ndarray, y: np.ndarray, tau: float) -> tuple[float, float, float]:
    decay = np.exp(-x / tau)
    design = np.column_stack((1 - decay, decay))
    (a, y0), *_ = np.linalg.lstsq(design, y, rcond=None)
    resid = y - design @ np.array([a, y0])
    return float(a), float(y0), float(resid @ resid)


def fit_exponential(x: Sequence[float] | np.ndarray, y: Sequence[float] | np.ndarray) -> ExponentialFit:
    """Least-squares y = a - (a - y0) exp(-x / tau): linear in (a, y0) for a given tau,
    tau found by a log-spaced grid then golden-section search (no scipy)."""
    x = np.asarray(x, float)
    y = np.asarray(y, float)
    span = max(float(x.max() - x.min()), 1.0)
    low, high = math.log(span / 200.0), math.log(span * 50.0)
    grid = np.linspace(low, high, 121)
    rss = [_linear_part(x, y, math.exp(g))[2] for g in grid]
    best = int(np.argmin(rss))
    lo, hi = grid[max(best - 1, 0)], grid[min(best + 1, len(grid) - 1)]
    golden = (math.sqrt(5) - 1) / 2
    c, d = hi - golden * (hi - lo), lo + golden * (hi - lo)
    fc, fd = _linear_part(x, y, math.exp(c))[2], _linear_part(x, y, math.exp(d))[2]
    for _ in range(200):
        if hi - lo < 1e-13:
            break
        if fc < fd:
            hi, d, fd = d, c, fc
            c = hi - golden * (hi - lo)
            fc = _linear_part(x, y, math.exp(c))[2]
        else:
            lo, c, fc = c, d, fd
            d = lo + golden * (hi - lo)
            fd = _linear_part(x, y, math.exp(d))[2]
    tau = math.exp((lo + hi) / 2)
    a, y0, res = _linear_part(x, y, tau)
    return ExponentialFit(a, y0, tau, res, best in (0, len(grid) - 1))


def fraction_point(tau: float, fraction: float) -> float:
    """n at which a fraction q of the gain is reached: tau ln(1 / (1 - q))."""
    return tau * math.log(1.0 / (1.0 - fraction))


def asymptote_fraction(curve: LearningCurve, fraction: float, min_sessions: int) -> PlateauResult:
    """The first session by which the fitted curve has made `fraction` of its gain."""
    points = curve.points
    if len(points) < min_sessions:
        return PlateauResult("asymptote_fraction", False, None, {"sessions": len(points)},
                             f"{len(points)} sessions of stage {curve.stage}, fewer than the {min_sessions} "
                             f"needed for a fit.")
    n = np.arange(len(points), dtype=float)
    fit = fit_exponential(n, [p.value for p in points])
    needed = fraction_point(fit.tau, fraction)
    figures = {"a": fit.a, "y0": fit.y0, "tau_sessions": fit.tau, "fraction": fraction,
               "sessions_needed": needed, "sessions": len(points)}
    gain = fit.a - fit.y0 if HIGHER_IS_BETTER[curve.measure] else fit.y0 - fit.a
    if fit.at_bound or gain <= 0:
        why = "shows no gain" if gain <= 0 else "shows no curvature (tau at the edge of its range)"
        return PlateauResult("asymptote_fraction", False, None, figures,
                             f"the exponential fit of {_words(curve.measure)} {why}, so no asymptote can be placed.")
    ordinal = math.ceil(needed - 1e-9)
    if ordinal >= len(points):
        return PlateauResult("asymptote_fraction", False, None, figures,
                             f"{fraction:.0%} of the fitted gain ({_fmt(fit.y0)} to {_fmt(fit.a)}) comes "
                             f"{_fmt(needed)} sessions after the first; only {len(points)} so far.")
    session = points[ordinal].session
    return PlateauResult("asymptote_fraction", True, session, figures,
                         f"{fraction:.0%} of the fitted gain of {_words(curve.measure)} ({_fmt(fit.y0)} to {_fmt(fit.a)}, "
                         f"tau {_fmt(fit.tau)} sessions) is reached by session {session}.")


# -- the protocol's rule --------------------------------------------------------

def judge(rule: PlateauRule, curve: LearningCurve, name: str | None = None) -> PlateauResult:
    """Apply the rule `name` (default: the protocol's) with the protocol's parameters."""
    name = name or rule.rule
    if name == "consecutive_sessions":
        if rule.threshold is None:
            return PlateauResult(name, False, None, {}, "no threshold set for consecutive_sessions.")
        return consecutive_sessions(curve, rule.threshold, rule.sessions)
    if name == "change_point":
        return change_point(curve, rule.crit, rule.sessions)
    if name == "slope":
        return slope(curve, rule.window, rule.max_slope, rule.confidence, rule.threshold)
    if name == "asymptote_fraction":
        return asymptote_fraction(curve, rule.fraction, rule.min_sessions)
    raise ValueError(f"unknown plateau rule {name!r}")


def judge_all(protocol: TrainingProtocol, curve: LearningCurve) -> dict[str, PlateauResult]:
    """Every rule that applies to the curve, the protocol's own first."""
    rule = protocol.plateau
    names = [rule.rule] + [n for n in RULES if n != rule.rule]
    out: dict[str, PlateauResult] = {}
    for name in names:
        own = name == rule.rule
        if not own and name == "consecutive_sessions" and rule.threshold is None:
            continue
        if not own and name == "change_point" and curve.measure not in BINARY_MEASURES:
            continue
        out[name] = judge(rule, curve, name)
    return out


# -- above chance: Smith et al. (2004) state-space learning curve ---------------

MAX_STEPS = 1000  # longer series are pooled into blocks of trials (binomial counts)


class StateSpaceCurve(NamedTuple):
    """Smoothed learning curve: per step (trial or block of trials)."""

    first_trial: np.ndarray  # 1-based first trial of each step
    p_mode: np.ndarray  # success probability at the smoothed state
    p_low: np.ndarray  # 5th percentile
    p_high: np.ndarray  # 95th percentile
    above_chance: np.ndarray  # P(p > chance)
    sigma2: float  # random-walk variance per step (EM estimate)
    iterations: int


def _logistic(value: float) -> float:
    if value >= 0:
        return 1.0 / (1.0 + math.exp(-value))
    e = math.exp(value)
    return e / (1.0 + e)


def _posterior_mode(state: float, prior_var: float, hits: float, total: float, mu: float,
                    start: float | None = None) -> float:
    """The root of g(x) = x - state - prior_var * (hits - total * logistic(mu + x)): safeguarded Newton.

    g rises strictly (g' = 1 + prior_var * total * p (1 - p) >= 1) and its root lies in
    [state + prior_var * (hits - total), state + prior_var * hits], so a Newton step that leaves
    the bracket is replaced by bisection (plain Newton overshoots on large blocks and diverges).
    A step below the tolerance ends the search before the bracket test: a converged step lands
    on a bracket end, and bisecting from there would restart the search. `start` is a first
    guess (the previous EM iteration's mode); the bracket keeps it safe.
    """
    low, high = state + prior_var * (hits - total), state + prior_var * hits
    guess = min(max(state if start is None else start, low), high)
    for _ in range(200):
        p = _logistic(mu + guess)
        value = guess - state - prior_var * (hits - total * p)
        if value > 0:
            high = guess
        else:
            low = guess
        step = value / (1 + prior_var * total * p * (1 - p))
        candidate = guess - step
        if abs(step) < 1e-12:
            return candidate
        if not low < candidate < high:
            candidate = 0.5 * (low + high)
        if abs(candidate - guess) < 1e-12 or high - low < 1e-12:
            return candidate
        guess = candidate
    return guess


def state_space_curve(outcomes: Sequence[bool] | np.ndarray, chance: float, block: int | None = None,
                      max_iter: int = 200, tol: float = 1e-4, sigma2: float | None = None) -> StateSpaceCurve:
    """Smith et al. (2004): x_k = x_(k-1) + e_k, p_k = logistic(logit(chance) + x_k),
    fitted by EM (random-walk variance and start state), with the nonlinear
    forward filter and fixed-interval smoother of that paper. Steps are single
    trials, or blocks of `block` trials (binomial counts) when the series is
    longer than MAX_STEPS. A given `sigma2` is used as it is (start state 0, no EM).

    Plain EM creeps towards its fixed point (hundreds of passes when the
    variance is small), so its steps are extrapolated by SQUAREM (Varadhan &
    Roland 2008, Scand J Stat 35:335), which reaches the same fixed point;
    `max_iter` counts filter-smoother passes, extrapolated or not."""
    from statistics import NormalDist

    x = np.asarray(outcomes, dtype=float)
    size = block or max(1, math.ceil(len(x) / MAX_STEPS))
    starts = np.arange(0, len(x), size)
    counts = np.add.reduceat(x, starts).tolist() if len(x) else []
    totals = np.diff(np.append(starts, len(x))).tolist()
    mu = math.log(chance / (1 - chance))
    em = _SmithEM(counts, totals, mu)
    if sigma2 is not None:
        em.run(sigma2, 0.0)
        passes = 1
    else:
        sigma2, _, passes = em.fit(0.05 * size, max_iter, tol)
    mean, sd = np.array(em.smooth), np.sqrt(np.maximum(np.array(em.smooth_v), 0.0))
    z = NormalDist().inv_cdf(0.95)
    logistic = np.vectorize(_logistic, otypes=[float])
    norm = NormalDist()
    above = np.array([1.0 - norm.cdf(-m / s) if s > 0 else float(m > 0) for m, s in zip(mean, sd, strict=True)])
    return StateSpaceCurve(starts + 1, logistic(mu + mean), logistic(mu + mean - z * sd),
                           logistic(mu + mean + z * sd), above, sigma2, passes)


class _SmithEM:
    """One filter-smoother pass of Smith et al. (2004) and the EM update it gives, kept with its arrays."""

    def __init__(self, counts: list[float], totals: list[int], mu: float) -> None:
        self.counts, self.totals, self.mu = counts, totals, mu
        steps = len(counts)
        self.post = [0.0] * steps
        self.post_v = [0.0] * steps
        self.prior_v = [0.0] * steps
        self.smooth = [0.0] * steps
        self.smooth_v = [0.0] * steps
        self.warm = False

    def run(self, sigma2: float, x0: float) -> tuple[float, float]:
        """Filter and smooth with (sigma2, x0); return EM's next (sigma2, x0)."""
        post, post_v, prior_v, smooth, smooth_v = self.post, self.post_v, self.prior_v, self.smooth, self.smooth_v
        counts, totals, mu, steps = self.counts, self.totals, self.mu, len(self.counts)
        state, var = x0, sigma2
        for k in range(steps):
            pv = var + sigma2
            total = totals[k]
            guess = _posterior_mode(state, pv, counts[k], total, mu, post[k] if self.warm else None)
            p = _logistic(mu + guess)
            state, var = guess, 1.0 / (1.0 / pv + total * p * (1 - p))
            post[k], post_v[k], prior_v[k] = state, var, pv
        self.warm = True
        smooth[-1], smooth_v[-1] = post[-1], post_v[-1]
        gains = [0.0] * steps
        for k in range(steps - 2, -1, -1):
            gain = post_v[k] / prior_v[k + 1]
            gains[k] = gain
            smooth[k] = post[k] + gain * (smooth[k + 1] - post[k])
            smooth_v[k] = post_v[k] + gain * gain * (smooth_v[k + 1] - prior_v[k + 1])
        gain0 = sigma2 / prior_v[0]  # the start state's prior variance is sigma2
        start = x0 + gain0 * (smooth[0] - x0)
        start_v = sigma2 + gain0 * gain0 * (smooth_v[0] - prior_v[0])
        total_sq = (smooth_v[0] + smooth[0] ** 2) - 2 * (gain0 * smooth_v[0] + smooth[0] * start) \
            + (start_v + start ** 2)
        for k in range(1, steps):
            total_sq += (smooth_v[k] + smooth[k] ** 2) - 2 * (gains[k - 1] * smooth_v[k] + smooth[k] * smooth[k - 1]) \
                + (smooth_v[k - 1] + smooth[k - 1] ** 2)
        return max(total_sq / steps, 1e-10), start

    def fit(self, sigma2: float, max_passes: int, tol: float) -> tuple[float, float, int]:
        """EM from (sigma2, 0) to its fixed point, SQUAREM-accelerated in (log sigma2, x0); (sigma2, x0, passes).

        Converged when one plain pass moves sigma2 by at most tol * sigma2 and x0 by at most
        tol * (1 + |x0|) (the plain EM's own test); the arrays are those of that last pass."""
        passes = 0

        def step(theta: tuple[float, float]) -> tuple[tuple[float, float], bool]:
            nonlocal passes
            passes += 1
            s2, x0 = math.exp(theta[0]), theta[1]
            new_s2, new_x0 = self.run(s2, x0)
            done = abs(new_s2 - s2) <= tol * s2 and abs(new_x0 - x0) <= tol * (1 + abs(x0))
            return (math.log(new_s2), new_x0), done

        theta = (math.log(sigma2), 0.0)
        while passes < max_passes:
            one, done = step(theta)
            if done or passes >= max_passes:
                return math.exp(one[0]), one[1], passes
            two, done = step(one)
            if done or passes >= max_passes:
                return math.exp(two[0]), two[1], passes
            r = (one[0] - theta[0], one[1] - theta[1])
            v = (two[0] - 2 * one[0] + theta[0], two[1] - 2 * one[1] + theta[1])
            r_norm, v_norm = math.hypot(*r), math.hypot(*v)
            alpha = max(min(-r_norm / v_norm, -1.0), -64.0) if v_norm > 0 else -1.0
            theta = (theta[0] - 2 * alpha * r[0] + alpha * alpha * v[0],
                     theta[1] - 2 * alpha * r[1] + alpha * alpha * v[1])
            if not (math.isfinite(theta[0]) and math.isfinite(theta[1])) or theta[0] < math.log(1e-10):
                theta = two
        return math.exp(theta[0]), theta[1], passes


def learning_trial(curve: LearningCurve, chance: float | None, level: float = 0.95) -> PlateauResult:
    """The first trial after which P(performance > chance) >= `level` for the rest of the stage."""
    if curve.measure not in BINARY_MEASURES or not curve.points:
        return PlateauResult("learning_trial", False, None, {},
                             f"the above-chance marker needs trial-by-trial {', '.join(BINARY_MEASURES)} data.")
    series = np.concatenate([p.outcomes for p in curve.points])
    owner = np.concatenate([np.full(len(p.outcomes), p.session) for p in curve.points])
    baseline = chance is None
    if baseline:
        head = series[: max(curve.points[0].trials, 1)]
        chance = min(max(float(head.mean()), 0.01), 0.99)
    fit = state_space_curve(series, chance)
    sure = fit.above_chance >= level
    figures: dict[str, Any] = {"chance": chance, "chance_from_first_session": baseline, "trials": len(series),
                               "sigma2": fit.sigma2, "block": int(fit.first_trial[1] - 1) if len(sure) > 1 else 1}
    below = np.nonzero(~sure)[0]
    what = "the first session's rate" if baseline else "chance"
    if len(below) == len(sure) or (len(below) and below[-1] == len(sure) - 1):
        return PlateauResult("learning_trial", False, None, figures,
                             f"performance is not above {what} ({_fmt(chance)}) with probability at least {level} at the end of "
                             f"stage {curve.stage}.")
    step = 0 if not len(below) else int(below[-1]) + 1
    trial = int(fit.first_trial[step])
    session = int(owner[trial - 1])
    figures["trial"] = trial
    return PlateauResult("learning_trial", True, session, figures,
                         f"from trial {trial} of stage {curve.stage} (session {session}) performance stays above "
                         f"{what} ({_fmt(chance)}) with probability at least {level}.")
