"""Plateau rules against published check values and reference libraries."""

from __future__ import annotations

import math

import numpy as np
import pytest
import ruptures
import statsmodels.api as sm
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.optimize import curve_fit
from scipy.stats import linregress

from monitor.core.session.plateau import (
    change_points,
    fit_exponential,
    fraction_point,
    judge,
    learning_trial,
    slope,
    state_space_curve,
)
from monitor.core.protocol import parse_protocol
from monitor.core.session.summary import SessionInput, learning_curve
from monitor.core.session.trials import Trial

# REFERENCES.md, Gallistel, Fairhurst & Balsam 2004 check values [checked with an independent port]
STEP = [0] * 30 + [1] * 30
MIXED = [1 if (i + 1) % 5 == 0 else 0 for i in range(40)] + [0 if (i + 1) % 5 == 0 else 1 for i in range(60)]


@pytest.mark.parametrize("crit", [1.3, 2, 4, 6])
def test_gallistel_step_series(crit):
    found = change_points(STEP, crit)
    assert [c.trial for c in found] == [30]  # change point 30 for crit 1.3 ... 6 (REFERENCES.md)


def test_gallistel_first_alert_value():
    first = change_points(STEP, 1.3)[0]
    assert first.detected_at == 31 and first.log_odds == pytest.approx(math.log10(31), abs=1e-12)  # REFERENCES.md


@pytest.mark.parametrize("crit", [1.3, 2, 4])
def test_gallistel_mixed_series(crit):
    assert [c.trial for c in change_points(MIXED, crit)] == [39]  # REFERENCES.md: change point 39


def test_gallistel_mixed_series_details():
    assert change_points(MIXED, 6) == []  # REFERENCES.md: none at crit 6 (max |L| = 5.02)
    assert change_points(MIXED, 5.0)[0].trial == 39  # just below that maximum it is still found
    assert change_points(MIXED, 5.03) == []
    assert change_points(MIXED, 2)[0].detected_at == 44  # REFERENCES.md: first |L| > 2 at trial 44


def test_ruptures_agrees_on_the_mixed_series():
    # ruptures Binseg, l2 cost, min_size=2, jump=1, n_bkps=1 -> [39, 100] (REFERENCES.md)
    signal = np.array(MIXED, float).reshape(-1, 1)
    bkps = ruptures.Binseg(model="l2", min_size=2, jump=1).fit(signal).predict(n_bkps=1)
    assert bkps == [39, 100]
    assert change_points(MIXED, 2)[0].trial == bkps[0]


def model(x, a, y0, tau):
    return a - (a - y0) * np.exp(-x / tau)


def test_exponential_fit_noiseless_against_curve_fit():
    # REFERENCES.md: curve_fit recovers a = 0.8, y0 = 0.1, tau = 300 from noiseless data (start 0.5, 0, 100)
    x = np.arange(0, 2000, dtype=float)
    y = model(x, 0.8, 0.1, 300.0)
    ref, _ = curve_fit(model, x, y, p0=(0.5, 0.0, 100.0))
    fit = fit_exponential(x, y)
    assert ref == pytest.approx((0.8, 0.1, 300.0), rel=1e-6)
    assert (fit.a, fit.y0, fit.tau) == pytest.approx((0.8, 0.1, 300.0), rel=1e-7)
    assert not fit.at_bound


@pytest.mark.parametrize("seed", range(5))
def test_exponential_fit_noisy_against_curve_fit(seed):
    rng = np.random.default_rng(seed)
    x = np.arange(30, dtype=float)
    y = model(x, 0.75, 0.15, 6.0) + rng.normal(0, 0.03, len(x))
    ref, _ = curve_fit(model, x, y, p0=(0.5, 0.0, 5.0))  # scipy.optimize.curve_fit as the reference
    fit = fit_exponential(x, y)
    ref_rss = float(np.sum((y - model(x, *ref)) ** 2))
    assert fit.rss <= ref_rss * (1 + 1e-9)
    assert (fit.a, fit.y0, fit.tau) == pytest.approx(tuple(ref), rel=1e-4)


@pytest.mark.parametrize("q, factor", [(0.90, 2.3026), (0.95, 2.9957), (0.99, 4.6052)])
def test_fraction_of_gain_check_values(q, factor):
    assert fraction_point(300.0, q) == pytest.approx(factor * 300.0, abs=0.01 * 300)  # REFERENCES.md [checked]
    assert fraction_point(1.0, q) == pytest.approx(factor, abs=5e-5)


def test_slope_and_interval_against_linregress_and_statsmodels():
    rng = np.random.default_rng(3)
    sessions = np.arange(1, 8, dtype=float)
    values = 0.6 + 0.004 * sessions + rng.normal(0, 0.02, len(sessions))
    curve = _curve_from_values(values)
    values = np.array([p.value for p in curve.points])  # the session values as the curve holds them
    result = slope(curve, window=7, max_slope=0.05, confidence=0.95)
    ref = linregress(sessions, values)  # scipy.stats.linregress: slope and its standard error
    ols = sm.OLS(values, sm.add_constant(sessions)).fit()  # statsmodels OLS: the 95 % interval of the slope
    low, high = ols.conf_int(alpha=0.05)[1]
    assert result.figures["slope"] == pytest.approx(ref.slope, rel=1e-10)
    assert (result.figures["low"], result.figures["high"]) == pytest.approx((low, high), rel=1e-9)
    assert result.reached == (low <= 0 <= high and abs(ref.slope) <= 0.05)


# -- rules on sessions of trial records ------------------------------------------------

def _trials(hits: int, n: int, stage: str = "final", interval: float = 700.0) -> list[Trial]:
    out = []
    for i in range(n):
        hit = i < hits
        out.append(Trial(i + 1, i * 5_000_000, interval if hit else interval * 2, 700.0, 560.0, 840.0, stage,
                         "hit" if hit else "miss", hit, "computed", "hit" if hit else "miss", 0))
    return out


def _curve_from_values(values, n=200):
    protocol = parse_protocol(PROTOCOL, "p.toml")
    sessions = [SessionInput(_trials(round(v * n), n)) for v in values]
    return learning_curve(protocol, sessions)


PROTOCOL = """
[protocol]
name = "plateau"
version = 4
task = "two_press"
target_ms = 700
tolerance = 0.2

[[stages]]
name = "shaping"
tolerance = 0.4

[[stages]]
name = "final"

[plateau]
rule = "consecutive_sessions"
min_hit_rate = 0.5
sessions = 3
min_trials = 30
"""


def test_hit_rate_equal_to_the_threshold_meets_it():
    protocol = parse_protocol(PROTOCOL, "p.toml")
    sessions = [SessionInput(_trials(5, 30)), SessionInput(_trials(15, 30)),  # 15/30 = 0.5 exactly
                SessionInput(_trials(20, 40)), SessionInput(_trials(25, 50))]
    result = judge(protocol.plateau, learning_curve(protocol, sessions))
    assert result.reached and result.session == 2
    assert "3 consecutive sessions" in result.reason and result.reason.endswith(".")


def test_left_out_sessions_neither_count_nor_break_and_stages_do_not_mix():
    protocol = parse_protocol(PROTOCOL, "p.toml")
    sessions = [
        SessionInput(_trials(30, 40)),
        SessionInput(_trials(0, 40), excluded=True, exclusion_reason="after muscimol"),
        SessionInput(_trials(2, 10)),  # fewer than min_trials = 30
        SessionInput(_trials(40, 40, stage="shaping")),  # another stage
        SessionInput(_trials(30, 40) + _trials(0, 40, stage="shaping")),  # only its final-stage trials count
        SessionInput(_trials(1, 40)),
    ]
    curve = learning_curve(protocol, sessions)
    assert [p.session for p in curve.points] == [1, 5, 6]
    assert dict(curve.left_out)[2] == "excluded: after muscimol" and 3 in dict(curve.left_out)
    assert curve.points[1].value == 0.75
    result = judge(protocol.plateau, curve)
    assert not result.reached and "so far 0 sessions in a row" in result.reason


def test_change_point_rule_on_sessions():
    protocol = parse_protocol(PROTOCOL.replace('rule = "consecutive_sessions"', 'rule = "change_point"\ncrit = 2'),
                              "p.toml")
    rng = np.random.default_rng(7)
    sessions = []
    for rate in [0.1, 0.1, 0.15, 0.7, 0.75, 0.7, 0.72]:
        outcomes = rng.random(60) < rate
        sessions.append(SessionInput([t._replace(rewarded=bool(o), outcome="hit" if o else "miss")
                                      for t, o in zip(_trials(0, 60), outcomes, strict=True)]))
    result = judge(protocol.plateau, learning_curve(protocol, sessions))
    assert result.reached and result.session in (3, 4), result.reason
    assert result.figures["change_points"][-1]["rate_after"] > result.figures["change_points"][-1]["rate_before"]
    flat = judge(protocol.plateau, learning_curve(protocol, sessions[:3]))
    assert not flat.reached


def test_asymptote_fraction_rule():
    protocol = parse_protocol(PROTOCOL.replace('rule = "consecutive_sessions"',
                                               'rule = "asymptote_fraction"\nfraction = 0.9'), "p.toml")
    values = model(np.arange(20.0), 0.8, 0.1, 3.0)  # 90 % of the gain at n = 3 ln 10 = 6.9 -> ordinal 7
    curve = _curve_from_values(values, n=1000)
    result = judge(protocol.plateau, curve)
    assert result.reached and result.session == 8, result.reason  # session index = ordinal + 1
    assert result.figures["tau_sessions"] == pytest.approx(3.0, rel=0.05)
    short = judge(protocol.plateau, _curve_from_values(values[:5], n=1000))
    assert not short.reached


def test_slope_rule_needs_a_flat_window_meeting_the_threshold():
    protocol = parse_protocol(PROTOCOL.replace('rule = "consecutive_sessions"', 'rule = "slope"\nwindow = 4'),
                              "p.toml")
    values = [0.1, 0.1, 0.1, 0.1, 0.3, 0.5, 0.6, 0.62, 0.61, 0.6, 0.615]
    result = judge(protocol.plateau, _curve_from_values(values))
    assert result.reached and result.session == 7, result.reason  # the flat start is below min_hit_rate


STEP_UP = np.r_[[(i + 1) % 5 == 0 for i in range(100)], [(i + 1) % 5 != 0 for i in range(100)]]  # 20 % then 80 %


def _grid_posterior(series, chance, sigma2):
    """The model's exact smoothed P(x_k > 0) by forward-backward on a fine grid (numerical integration)."""
    from scipy.stats import norm

    grid = np.linspace(-6, 6, 601)
    kernel = norm.pdf(grid[:, None] - grid[None, :], scale=math.sqrt(sigma2))
    kernel /= kernel.sum(0, keepdims=True)
    p = 1 / (1 + np.exp(-(math.log(chance / (1 - chance)) + grid)))
    prev = norm.pdf(grid, 0, math.sqrt(sigma2))
    prev /= prev.sum()
    alpha = []
    for o in series:
        a = (kernel @ prev) * (p if o else 1 - p)
        prev = a / a.sum()
        alpha.append(prev)
    post, beta = [alpha[-1]], np.ones(len(grid))
    for k in range(len(series) - 2, -1, -1):
        beta = kernel.T @ (beta * (p if series[k + 1] else 1 - p))
        beta /= beta.sum()
        g = alpha[k] * beta
        post.append(g / g.sum())
    return np.array([q[grid > 0].sum() for q in reversed(post)])


def test_state_space_smoother_against_exact_integration():
    # Smith et al. 2004's filter and smoother are Gaussian approximations: they must track the exact posterior
    exact = _grid_posterior(STEP_UP, 0.2, 0.05)
    mine = state_space_curve(STEP_UP, chance=0.2, sigma2=0.05).above_chance
    assert np.max(np.abs(mine - exact)) < 0.08
    last_exact, last_mine = np.nonzero(exact < 0.95)[0][-1], np.nonzero(mine < 0.95)[0][-1]
    assert abs(int(last_exact) - int(last_mine)) <= 2


def _sessions_of(series, size=40):
    chunks = np.reshape(series, (-1, size))
    return [SessionInput([t._replace(rewarded=bool(o), outcome="hit" if o else "miss")
                          for t, o in zip(_trials(0, size), chunk, strict=True)]) for chunk in chunks]


@pytest.mark.slow
def test_learning_trial_marks_above_chance():
    protocol = parse_protocol(PROTOCOL, "p.toml")
    result = learning_trial(learning_curve(protocol, _sessions_of(STEP_UP)), chance=0.2)
    # the step is at trial 101; the smoother sees it coming a few trials early
    assert result.reached and 80 <= result.figures["trial"] <= 101 and result.session == 3, result.reason
    flat = np.array([(i + 1) % 5 == 0 for i in range(200)])  # 20 % throughout: chance
    assert not learning_trial(learning_curve(protocol, _sessions_of(flat)), chance=0.2).reached
    baseline = learning_trial(learning_curve(protocol, _sessions_of(STEP_UP)), chance=None)
    assert baseline.figures["chance_from_first_session"] and baseline.figures["chance"] == 0.2


def brute_candidates(series, origin=0):
    """The candidate rule read literally: argmax over n of |C(n) - C(r0) - (n - r0)(C(t) - C(r0))/(t - r0)|."""
    cum = np.concatenate(([0.0], np.cumsum(series)))
    out = []
    for t in range(origin + 1, len(series) + 1):
        n = np.arange(origin, t + 1)
        chord = cum[origin] + (n - origin) * (cum[t] - cum[origin]) / (t - origin)
        dev = np.abs(cum[origin : t + 1] - chord)
        best = np.nonzero(np.isclose(dev, dev.max(), rtol=0, atol=1e-9))[0]
        out.append(set((origin + best).tolist()))
    return out


@pytest.mark.slow
@settings(max_examples=200, deadline=None)
@given(st.lists(st.booleans(), min_size=2, max_size=120), st.integers(0, 5))
def test_hull_candidates_equal_the_literal_rule(series, origin):
    from monitor.core.session.plateau import _RecordHull

    origin = min(origin, len(series) - 1)
    cum = [0] + np.cumsum(series, dtype=int).tolist()
    hull = _RecordHull(cum, origin)
    split = (origin + 1 + len(series)) // 2  # asked in two runs, as the search asks chunk by chunk
    chosen_all = hull.candidates(origin + 1, split) + hull.candidates(split + 1, len(series))
    for chosen, allowed in zip(chosen_all, brute_candidates(series, origin), strict=True):
        assert chosen in allowed and chosen == min(allowed)  # the first trial on a tie


def literal_change_points(series, crit):
    """Gallistel et al.'s search read literally, trial by trial: the first candidate on a tie (brute_candidates),
    L from scipy.stats.binom (the reference), a change at the first |L| > crit, the search restarted from it."""
    from scipy.stats import binom

    cum = np.concatenate(([0], np.cumsum(series)))
    found, origin, t = [], 0, 1
    while t <= len(series):
        r = min(brute_candidates(series[:t], origin)[-1])
        n, k, p = cum[t] - cum[origin], cum[t] - cum[r], (t - r) / (t - origin)
        if r > origin and t > r:
            with np.errstate(divide="ignore"):
                score = np.log10(binom.cdf(k, n, p)) - np.log10(binom.sf(k - 1, n, p) if k >= 1 else 1.0)
            if abs(score) > crit:
                found.append((r, t))
                origin = r
        t += 1
    return found


@pytest.mark.slow  # the literal search costs O(n^2)
@pytest.mark.parametrize("seed", [1, 2])
def test_change_points_equal_the_literal_search_across_many_restarts(seed):
    rng = np.random.default_rng(seed)
    rates = [0.2, 0.8, 0.3, 0.9, 0.1, 0.7, 0.4, 0.95]  # a change every 40 trials: restarts inside scoring blocks
    series = np.concatenate([rng.random(40) < rate for rate in rates])
    mine = [(c.trial, c.detected_at) for c in change_points(series, 1.3)]
    assert len(mine) >= 4 and mine == literal_change_points(series, 1.3)


@pytest.mark.parametrize("prior_var", [0.01, 0.5, 5.0, 20.0])
@pytest.mark.parametrize("hits, total", [(50, 50), (45, 50), (0, 50), (1, 1), (0, 1)])
@pytest.mark.parametrize("chance", [0.01, 0.5, 0.9])
def test_posterior_mode_equals_brentq(prior_var, hits, total, chance):
    """The filter's per-step posterior mode (Smith et al. 2004, eq. for x_k|k) is the root that
    scipy.optimize.brentq finds for the same equation; plain Newton went astray on large blocks."""
    from scipy.optimize import brentq

    from monitor.core.session.plateau import _logistic, _posterior_mode

    mu, state = math.log(chance / (1 - chance)), 0.3

    def g(x: float) -> float:
        return x - state - prior_var * (hits - total * _logistic(mu + x))

    root = brentq(g, state + prior_var * (hits - total) - 1, state + prior_var * hits + 1, xtol=1e-13)
    assert _posterior_mode(state, prior_var, hits, total, mu) == pytest.approx(root, abs=1e-9)


@pytest.mark.slow
def test_long_series_from_a_low_baseline_stays_finite():
    """A first session with no hit puts chance at its 0.01 floor; 22,000 later trials at ~70 %
    overflowed the old Newton step (seen on a demo animal's 75 sessions)."""
    rng = np.random.default_rng(0)
    outcomes = np.r_[np.zeros(300), rng.random(22000) < 0.7]
    fit = state_space_curve(outcomes, 0.01)
    assert np.all(np.isfinite(fit.p_mode)) and fit.p_mode[-1] > 0.6


@pytest.mark.parametrize("start_offset", [None, -3.0, 0.0, 2.5, 40.0])
def test_posterior_mode_from_any_start_equals_brentq(start_offset):
    """A warm start anywhere (even outside the bracket) reaches the root scipy.optimize.brentq finds,
    and a step that converges onto a bracket end ends the search instead of bisecting again."""
    from scipy.optimize import brentq

    from monitor.core.session.plateau import _logistic, _posterior_mode

    mu, state, prior_var, hits, total = math.log(0.1 / 0.9), 1.0, 0.087, 2.0, 2
    root = brentq(lambda x: x - state - prior_var * (hits - total * _logistic(mu + x)), -5, 5, xtol=1e-14)
    start = None if start_offset is None else root + start_offset
    assert _posterior_mode(state, prior_var, hits, total, mu, start) == pytest.approx(root, abs=1e-9)


def test_log_odds_equals_scipy_binomial():
    """The change-point score log10(P(X <= k) / P(X >= k)) from scipy.special's incomplete beta
    equals scipy.stats.binom's logcdf and logsf (reference library), k = 0 and k = n included."""
    from scipy.stats import binom

    from monitor.core.session.plateau import LN10, _log_odds

    rng = np.random.default_rng(3)
    n = rng.integers(1, 400, 500).astype(float)
    k = np.floor(rng.random(500) * (n + 1))
    p = rng.uniform(0.02, 0.98, 500)
    with np.errstate(divide="ignore"):
        ref = (binom.logcdf(k, n, p) - binom.logsf(k - 1, n, p)) / LN10
    mine = _log_odds(k, n, p)
    finite = np.isfinite(ref)
    assert finite.sum() > 450 and np.allclose(mine[finite], ref[finite], rtol=1e-9, atol=1e-9)
    # where scipy.stats's tail underflows to an infinite score, ours is a finite one far past any criterion
    assert np.all(np.sign(mine[~finite]) == np.sign(ref[~finite])) and np.all(np.abs(mine[~finite]) > 100)


def test_slope_interval_uses_student_t():
    """The slope rule's interval is the OLS slope +/- t(0.95, n - 2) * SE, as scipy.stats.linregress
    and scipy.stats.t give it (reference library)."""
    from scipy.stats import t as student

    from monitor.core.session.plateau import _slope

    x = np.arange(1.0, 9.0)
    y = np.array([0.41, 0.45, 0.44, 0.52, 0.50, 0.55, 0.53, 0.58])
    ref = linregress(x, y)
    half = student.ppf(0.95, len(x) - 2) * ref.stderr
    value, low, high = _slope(x, y, 0.90)
    assert value == pytest.approx(ref.slope) and low == pytest.approx(ref.slope - half)
    assert high == pytest.approx(ref.slope + half)


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_accelerated_em_stops_at_the_em_fixed_point(seed):
    """SQUAREM (Varadhan & Roland 2008) only extrapolates EM's steps: at the variance it returns,
    one more plain EM pass of Smith et al. (2004) barely moves it, in far fewer passes than
    plain EM needs (hundreds on a series like this)."""
    from monitor.core.session.plateau import _SmithEM

    rng = np.random.default_rng(seed)
    n = 3000
    outcomes = rng.random(n) < np.linspace(0.1, 0.6, n)
    fit = state_space_curve(outcomes, 0.1)
    assert fit.iterations < 60
    counts = np.add.reduceat(outcomes.astype(float), np.arange(0, n, 3)).tolist()
    em = _SmithEM(counts, [3] * len(counts), math.log(0.1 / 0.9))
    sigma2, x0, _ = em.fit(0.15, 200, 1e-4)
    assert sigma2 == pytest.approx(fit.sigma2)
    next_sigma2, next_x0 = em.run(sigma2, x0)
    assert next_sigma2 == pytest.approx(sigma2, rel=1e-3) and next_x0 == pytest.approx(x0, abs=1e-3)
