"""The consolidation figure: the best optimum, the same answer for the same data, only supported numbers.

Check values from outside the estimator: mock_rig's learner (an independent simulator of an
error-driven two-process animal) and the log-likelihood of our model at its generating
parameters (the filter itself is checked against statsmodels in test_consolidation_kalman.py).
"""

from __future__ import annotations

from dataclasses import replace

import numpy as np
import pytest

from mock_rig.learner import Learner, LearnerParams
from monitor.core.consolidation.analysis import Options, consolidation_block, estimate_consolidation
from monitor.core.consolidation.estimate import Forecast
from monitor.core.consolidation.model import TrialSeries, evaluate, prepare, simulate
from monitor.core.consolidation.words import fraction_text

pytestmark = pytest.mark.slow  # maximum-likelihood fits of long simulated series: seconds per test

TARGET_MS = 650.0
FAST = Options(draws=16, state_draws=16)
TRUTH = {"a_f": 0.95, "b_f": 0.05, "c": 1.2e-3, "slow_leak": 1e-5, "tau_b": 20.0, "q_f": 1e-3, "q_s": 1e-5}


def _slow_consolidator(sessions: int = 30, seed: int = 3):
    """mock_rig's error-driven learner that keeps consolidating long after its plateau."""
    rng = np.random.default_rng(seed)
    params = LearnerParams(b_fast=0.012, transfer=0.00005, fast_break_tau_h=18.0)
    learner = Learner(params, rng)
    hours = np.where(np.arange(sessions) % 5 == 0, 70.0, 22.0)
    labels, intervals, rewarded = [], [], []
    for k in range(sessions):
        learner.start_session(None if k == 0 else float(hours[k]))
        for _ in range(int(rng.integers(200, 301))):
            interval, y, noise = learner.produce_ms()
            hit = abs(interval - TARGET_MS) <= 0.2 * TARGET_MS
            learner.learn(TARGET_MS, y, noise, hit)
            labels.append(k + 1)
            intervals.append(interval)
            rewarded.append(hit)
    series = TrialSeries.from_intervals(np.array(labels), np.array(intervals), TARGET_MS, np.array(rewarded),
                                        hours, np.zeros(sessions, bool))
    truth = {"a_f": params.a_fast, "b_f": params.b_fast, "c": params.transfer, "slow_leak": 1e-7,
             "tau_b": params.fast_break_tau_h, "q_f": 1e-7, "q_s": 1e-9}
    return series, truth, learner.consolidation()


@pytest.fixture(scope="module")
def slow():
    series, truth, fraction = _slow_consolidator()
    return series, truth, fraction, estimate_consolidation(series, FAST)


def test_the_search_reaches_the_generating_parameters_likelihood(slow):
    series, truth, fraction, res = slow
    at_truth = evaluate(prepare(series), truth, "error", True).profiled.loglike
    assert res.two_rate.loglike >= at_truth - 1.0, (res.two_rate.loglike, at_truth)
    assert res.two_rate.variant == "error"  # the generating drive
    last = res.sessions[-1]
    assert last.status == "estimated" and last.low <= fraction <= last.high
    assert abs(last.estimate - fraction) <= 0.05


def test_a_cached_refit_of_the_same_data_gives_the_same_answer(slow):
    series, _, _, fresh = slow
    again = estimate_consolidation(series, FAST, warm_start=fresh.warm_start)
    assert again.from_cache
    for a, b in zip(fresh.sessions, again.sessions):
        assert a.status == b.status
        assert abs(a.estimate - b.estimate) <= 0.01
        assert abs(a.low - b.low) <= 0.02 and abs(a.high - b.high) <= 0.02


def _first(series: TrialSeries, count: int) -> TrialSeries:
    keep = series.session <= series.labels[count - 1]
    return TrialSeries(series.session[keep], series.y[keep], series.rewarded[keep], series.break_hours[:count],
                       series.excluded[:count])


def test_session_by_session_refits_end_where_one_fit_of_everything_does():
    rng = np.random.default_rng(1)
    lengths = rng.integers(150, 190, 12)
    sim = simulate(TRUTH, lengths, rng.choice([22.0, 24.0, 48.0, 70.0], 12), rng, warmup=-0.2)
    whole = estimate_consolidation(sim.series, FAST)
    chained = estimate_consolidation(_first(sim.series, 10), FAST)
    for count in (11, 12):
        chained = estimate_consolidation(_first(sim.series, count), FAST, warm_start=chained.warm_start)
    assert chained.two_rate.loglike == pytest.approx(whole.two_rate.loglike, abs=0.05)
    for a, b in zip(whole.sessions, chained.sessions):
        assert a.status == b.status
        assert abs(a.estimate - b.estimate) <= 0.01
        assert abs(a.low - b.low) <= 0.02 and abs(a.high - b.high) <= 0.02


def test_hysteresis_keeps_an_earlier_estimated_inside_the_band(slow):
    series, _, _, fresh = slow
    margin = fresh.delta_aic + 2.0  # the comparison now falls 2 short of the threshold
    options = replace(FAST, aic_margin=margin)
    plain = estimate_consolidation(series, options, warm_start=fresh.warm_start | {"status": "not constrained"})
    assert plain.status == "not constrained"
    kept = estimate_consolidation(series, options, warm_start=fresh.warm_start | {"status": "estimated"})
    assert kept.status == "estimated" and "still preferred" in kept.reason
    gone = estimate_consolidation(series, replace(options, aic_margin=fresh.delta_aic + 5.0),
                                  warm_start=fresh.warm_start | {"status": "estimated"})
    assert gone.status == "not constrained"  # beyond the band the evidence wins


def test_an_unsupported_figure_is_never_stated_alone(slow):
    series, _, _, fresh = slow
    res = estimate_consolidation(series, replace(FAST, aic_margin=fresh.delta_aic + 20.0))
    block = consolidation_block(res)
    assert block["status"] == "not constrained" and "estimate" in block  # the contract keeps the key
    assert block["estimate_supported"] is False and "must not be read alone" in block["estimate_note"]
    assert not any(row["estimate_supported"] for row in block["trajectory"])
    text = fraction_text(block["estimate"], block["low"], block["high"], block["status"])
    assert f"{block['estimate']:.2f} " not in text.split("interval")[0] and "no point value" in text
    good = consolidation_block(fresh)
    assert good["estimate_supported"] is True
    assert fraction_text(good["estimate"], good["low"], good["high"], "estimated").startswith(f"{good['estimate']:.2f}")


def test_the_stated_point_is_the_median_of_its_draws_and_inside_its_band(slow):
    _, _, _, res = slow
    for s in res.sessions:
        assert s.low <= s.estimate <= s.high


def test_a_forecast_never_names_a_level_already_passed(slow):
    series, _, _, res = slow
    from monitor.core.consolidation.estimate import forecast, slow_fractions

    prep = prepare(series)
    fractions = slow_fractions(prep, [res.two_rate], np.random.default_rng(0), 8, 8)
    passed = forecast(prep, res.two_rate, fractions, level=float(fractions.estimate[-1]) - 0.05)
    assert passed.reached and passed.summary == f"already above {float(fractions.estimate[-1]) - 0.05:.2f}"
    assert passed.sessions_low is None and passed.sessions_median is None
    ahead = Forecast(0.8, 3, 5, 9, 200, 300, 22.0, False)
    assert ahead.summary == "0.80 in 3–9 more sessions (model range)"
