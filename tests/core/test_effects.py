"""The effects core against reference libraries: scipy.stats.bootstrap, statsmodels OLS, scipy.stats.t."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from monitor.core.effects.animal import (BASELINE_SESSIONS, Candidate, SessionTrials, animal_effect, baseline_sessions,
                                  compare, recovery, session_measures)
from monitor.core.effects.cohort import Point, group_table, trend
from monitor.core.session.summary import figures
from monitor.core.session.trials import Trial

TARGET = 650.0


def _seeded(seed: int) -> dict:
    """scipy.stats.bootstrap's generator argument: `rng` from scipy 1.15, `random_state` before it."""
    import inspect

    name = "rng" if "rng" in inspect.signature(stats.bootstrap).parameters else "random_state"
    return {name: np.random.default_rng(seed)}


def _session(index: int, rng: np.random.Generator, n: int = 300, p_hit: float = 0.6, p_premature: float = 0.05,
             minutes: float | None = 30.0) -> SessionTrials:
    """Attempts drawn at random: premature, else hit (interval inside ±20 %) or miss."""
    trials = []
    for i in range(n):
        if rng.random() < p_premature:
            trials.append(Trial(i + 1, i, 60.0, TARGET, 520, 780, "final", "premature", False, "rig", "premature", 0))
            continue
        hit = rng.random() < p_hit
        interval = TARGET * math.exp(rng.normal(0, 0.08)) if hit else TARGET * rng.choice([0.6, 1.5])
        trials.append(Trial(i + 1, i, interval, TARGET, 520, 780, "final", "hit" if hit else "miss", hit, "rig",
                            "hit" if hit else "miss", 0))
    return SessionTrials(index, trials, minutes)


def test_session_measures_match_the_session_figures_and_numpy():
    s = _session(1, np.random.default_rng(1))
    m = session_measures(s)
    f = figures(s.trials, (520, 780))
    done = [t for t in s.trials if t.completed]
    intervals = np.array([t.interval_ms for t in done])
    assert m["hit_rate"] == pytest.approx(f.hit_rate)
    assert m["interval_error"] == pytest.approx(f.median_abs_log_error)
    assert m["cv"] == pytest.approx(np.std(intervals, ddof=1) / np.mean(intervals))  # numpy, ddof 1
    assert m["premature_rate"] == pytest.approx(f.premature / (f.trials + f.premature))
    assert m["trials_per_minute"] == pytest.approx(len(done) / 30.0)


def _codes(s: SessionTrials) -> np.ndarray:
    """0 miss, 1 hit, 2 premature: what scipy.stats.bootstrap resamples."""
    return np.array([2 if t.outcome == "premature" else int(t.rewarded) for t in s.trials], float)


@pytest.mark.slow  # scipy's bootstrap beside ours
def test_stratified_bootstrap_agrees_with_scipy():
    rng = np.random.default_rng(5)
    test = _session(4, rng, p_hit=0.35)
    base = [_session(i, rng, p_hit=0.6) for i in (1, 2, 3)]
    ours = compare([test], base, resamples=20000, seed=3)["hit_rate"]

    def hit_rate(x, axis=-1):
        return (x == 1).sum(axis=axis) / (x < 2).sum(axis=axis)

    def statistic(a, b1, b2, b3, axis=-1):
        return hit_rate(a, axis) - (hit_rate(b1, axis) + hit_rate(b2, axis) + hit_rate(b3, axis)) / 3

    # scipy.stats.bootstrap with several samples resamples each sample on its own: the same stratified
    # bootstrap (scipy documentation, scipy.stats.bootstrap, "data: ... each sample is resampled independently")
    ref = stats.bootstrap(tuple(_codes(s) for s in (test, *base)), statistic, n_resamples=20000,
                          method="percentile", confidence_level=0.95, vectorized=True,
                          **_seeded(4)).confidence_interval
    assert ours.low == pytest.approx(ref.low, abs=0.006)     # Monte Carlo error of 20,000 resamples: ~0.002
    assert ours.high == pytest.approx(ref.high, abs=0.006)
    assert ours.effect == pytest.approx(statistic(*(_codes(s) for s in (test, *base))))


@pytest.mark.slow  # bootstrap intervals of many simulated animals
def test_bootstrap_interval_width_matches_the_binomial_standard_error():
    rng = np.random.default_rng(8)
    a, b = _session(2, rng, n=800, p_premature=0), _session(1, rng, n=800, p_premature=0)
    e = compare([a], [b], resamples=20000, seed=1)["hit_rate"]
    pa, pb = e.affected, e.baseline
    se = math.sqrt(pa * (1 - pa) / 800 + pb * (1 - pb) / 800)   # Wald standard error of a difference of proportions
    assert (e.high - e.low) == pytest.approx(2 * stats.norm.ppf(0.975) * se, rel=0.05)


def test_trials_per_minute_interval_is_poisson():
    rng = np.random.default_rng(2)
    a, b = _session(2, rng, p_premature=0), _session(1, rng, p_premature=0)
    e = compare([a], [b], resamples=20000, seed=1)["trials_per_minute"]
    se = math.sqrt(len(a.trials) + len(b.trials)) / 30.0    # Poisson counts: variance = mean (common practice)
    assert (e.high - e.low) == pytest.approx(2 * 1.96 * se, rel=0.06)


def test_unknown_minutes_and_empty_sessions_give_no_interval():
    rng = np.random.default_rng(3)
    e = compare([_session(2, rng, minutes=None)], [_session(1, rng)])
    assert e["trials_per_minute"].effect is None and e["trials_per_minute"].low is None
    e = compare([SessionTrials(2, [], 30.0)], [_session(1, rng)])
    assert e["hit_rate"].effect is None
    with pytest.raises(ValueError):
        compare([], [_session(1, rng)])


def test_baseline_rule_takes_the_last_usable_sessions_of_the_stage():
    c = [Candidate(1, ("wide",), True), Candidate(2, ("wide", "final"), True), Candidate(3, ("final",), True),
         Candidate(4, ("final",), False), Candidate(5, ("final",), True), Candidate(6, ("final",), True),
         Candidate(7, ("final",), True)]
    assert baseline_sessions(c, 7, "final") == (3, 5, 6)
    assert baseline_sessions(c, 4, "final") == (2, 3)
    assert baseline_sessions(c, 7, "final", count=1) == (6,)
    assert BASELINE_SESSIONS == 3


def test_recovery_counts_sessions_until_back_within_the_baseline():
    rng = np.random.default_rng(12)
    base = [_session(i, rng, p_hit=0.6) for i in (1, 2, 3)]
    after = [_session(4, rng, p_hit=0.2), _session(5, rng, p_hit=0.35), _session(6, rng, p_hit=0.6)]
    r = recovery(after, base)
    assert r.recovered and r.sessions == 3 and r.session_index == 6
    r = recovery(after[:2], base)
    assert not r.recovered and r.sessions is None and r.followed == 2
    effect = animal_effect(after[0], base, later=after[1:], control=_session(9, rng, p_hit=0.6))
    assert effect.recovery.sessions == 3
    assert effect.vs_control["hit_rate"].high < 0 and effect.control_index == 9


def test_trend_matches_statsmodels_ols():
    sm = pytest.importorskip("statsmodels.api")
    rng = np.random.default_rng(4)
    x = rng.uniform(0, 1, 25)
    y = -0.5 + 0.4 * x + rng.normal(0, 0.1, 25)
    ours = trend(x, y)
    fit = sm.OLS(y, sm.add_constant(x)).fit()
    low, high = fit.conf_int(0.05)[1]           # statsmodels OLS: t interval of the slope
    assert ours.slope == pytest.approx(fit.params[1])
    assert ours.intercept == pytest.approx(fit.params[0])
    assert (ours.slope_low, ours.slope_high) == pytest.approx((low, high))
    pred = fit.get_prediction(sm.add_constant(np.array([0.0, 0.5, 1.0]))).conf_int(alpha=0.05)
    _, lo, hi = ours.line([0.0, 0.5, 1.0])
    assert lo == pytest.approx(pred[:, 0]) and hi == pytest.approx(pred[:, 1])
    assert trend([0.1, 0.2], [1, 2]) is None and trend([0.5] * 4, [1, 2, 3, 4]) is None


def test_group_table_matches_scipy_t_interval():
    pts = [Point(f"a{i}", "G-7Q", "test", 0.5, None, None, y, None, None) for i, y in enumerate([-0.3, -0.2, -0.4])]
    pts.append(Point("b", "G-7Q", "control", 0.5, None, None, 0.01, None, None))
    rows = group_table(pts)
    assert [(r.group, r.role, r.n) for r in rows] == [("G-7Q", "test", 3), ("G-7Q", "control", 1)]
    ys = [-0.3, -0.2, -0.4]
    low, high = stats.t.interval(0.95, 2, loc=np.mean(ys), scale=stats.sem(ys))  # scipy.stats.t
    assert (rows[0].low, rows[0].high) == pytest.approx((low, high))
    assert rows[1].low is None


@pytest.mark.slow  # scipy's bootstrap beside ours
def test_interval_error_bootstrap_agrees_with_scipy():
    rng = np.random.default_rng(9)
    test, base = _session(2, rng, p_hit=0.3), _session(1, rng, p_hit=0.7)
    ours = compare([test], [base], resamples=20000, seed=2)["interval_error"]

    def errors(s: SessionTrials) -> np.ndarray:
        return np.array([abs(math.log(t.interval_ms / t.target_ms)) if t.completed else np.nan for t in s.trials])

    def statistic(a, b, axis=-1):
        return np.nanmedian(a, axis=axis) - np.nanmedian(b, axis=axis)

    # scipy.stats.bootstrap, two samples resampled independently, numpy's nanmedian as the statistic
    ref = stats.bootstrap((errors(test), errors(base)), statistic, n_resamples=20000, method="percentile",
                          vectorized=True, **_seeded(6)).confidence_interval
    assert ours.effect == pytest.approx(statistic(errors(test), errors(base)))
    assert ours.low == pytest.approx(ref.low, abs=0.01) and ours.high == pytest.approx(ref.high, abs=0.01)
