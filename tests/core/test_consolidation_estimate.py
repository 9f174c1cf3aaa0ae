"""The estimate end to end on animals simulated from our own model (known truth), and its report block."""

from __future__ import annotations

import numpy as np
import pytest

from monitor.core.consolidation.analysis import Options, consolidation_block, estimate_consolidation
from monitor.core.consolidation.model import TrialSeries, simulate

pytestmark = pytest.mark.slow  # model fits on simulated animals: seconds per test

FAST = Options(starts=2, draws=16, state_draws=16)
TRUTH = {"a_f": 0.95, "b_f": 0.05, "c": 1.2e-3, "slow_leak": 1e-5, "tau_b": 20.0, "q_f": 1e-3, "q_s": 1e-5}


def _animal(seed: int, params: dict, sessions: int = 14, trials: int = 170):
    rng = np.random.default_rng(seed)
    lengths = rng.integers(trials - 20, trials + 20, sessions)
    hours = rng.choice([22.0, 24.0, 26.0, 48.0, 70.0], sessions)
    return simulate(params, lengths, hours, rng, warmup=-0.2)


@pytest.fixture(scope="module")
def matched():
    sim = _animal(1, TRUTH)
    return sim, estimate_consolidation(sim.series, FAST)


def test_matched_animal_is_estimated_and_covered(matched):
    sim, res = matched
    assert res.status == "estimated", res.reason
    low = np.array([s.low for s in res.sessions])
    high = np.array([s.high for s in res.sessions])
    est = np.array([s.estimate for s in res.sessions])
    truth = sim.end_fraction
    assert np.mean((low <= truth) & (truth <= high)) >= 0.8
    assert np.median(np.abs(est - truth)[4:]) <= 0.1
    assert np.all((0 <= low) & (low <= est) & (est <= high) & (high <= 1))


def test_block_has_the_contract_keys_and_extras(matched):
    sim, res = matched
    block = consolidation_block(res)
    assert block["session"] == int(sim.series.labels[-1])
    for key in ("estimate", "low", "high"):
        assert isinstance(block[key], float) and 0.0 <= block[key] <= 1.0
    assert block["status"] in {"estimated", "not constrained"}
    assert len(block["trajectory"]) == len(sim.series.labels)
    assert block["comparison"]["two_rate_preferred"] is True
    assert block["comparison"]["delta_aic"] >= 10
    assert "not proof" in block["caveat"]
    forecast = block["forecast"]
    assert forecast["level"] == 0.8 and forecast["trials_per_session"] > 0


def test_one_rate_animal_is_never_confidently_wrong():
    sim = _animal(2, TRUTH | {"c": 0.0, "q_s": 0.0}, sessions=10)  # no slow process: true fraction 0
    res = estimate_consolidation(sim.series, FAST)
    truth = sim.end_fraction
    low = np.array([s.low for s in res.sessions])
    high = np.array([s.high for s in res.sessions])
    assert np.all((low <= truth + 1e-9) & (truth <= high + 1e-9)), (res.status, res.reason)


def test_warm_start_reuses_the_previous_fit(matched):
    sim, res = matched
    again = estimate_consolidation(sim.series, FAST, warm_start=res.warm_start)
    assert again.two_rate.loglike >= res.two_rate.loglike - 0.5
    assert again.evaluations < res.evaluations
    assert again.from_cache and not res.from_cache


def test_too_few_trials_and_cancel_and_progress():
    short = _animal(3, TRUTH, sessions=3, trials=60)
    res = estimate_consolidation(short.series, FAST)
    assert res.status == "too few trials"
    assert all((s.estimate, s.low, s.high) == (0.0, 0.0, 1.0) for s in res.sessions)
    sim = _animal(4, TRUTH, sessions=8)
    calls = []
    res = estimate_consolidation(sim.series, FAST, progress=lambda f, m: calls.append(f),
                                 cancel=lambda: len(calls) >= 2)
    assert res.status == "cancelled"
    assert calls == sorted(calls) and calls[0] == 0.0


def test_malformed_values_are_kept_out_and_counted():
    sim = _animal(5, TRUTH, sessions=8)
    y = sim.series.y.copy()
    y[[3, 400, 900]] = [np.nan, np.inf, -np.inf]
    series = TrialSeries(sim.series.session, y, sim.series.rewarded, sim.series.break_hours, sim.series.excluded)
    res = estimate_consolidation(series, Options(min_trials=10**9))  # counting needs no fit
    assert res.status == "too few trials"
    assert res.dropped_trials == 3
    assert res.n_trials == len(y) - 3
