"""The live (one trial at a time) filter against the batch filter; an empty series is a value, not a crash."""

from __future__ import annotations

import json

import numpy as np
import pytest

from monitor.core.consolidation.analysis import ConsolidationResult, Options, SessionEstimate, consolidation_block, estimate_consolidation
from monitor.core.consolidation.fit import ModelFit
from monitor.core.consolidation.live import LiveFilter, LiveSetup, filter_state, live_filter, restore_filter
from monitor.core.consolidation.model import TWO_RATE, TrialSeries, evaluate, prepare, simulate, to_theta

TRUTH = {"a_f": 0.95, "b_f": 0.05, "c": 1.2e-3, "slow_leak": 1e-5, "tau_b": 20.0, "q_f": 1e-3, "q_s": 1e-5}


def _series(seed: int = 1, sessions: int = 6) -> TrialSeries:
    rng = np.random.default_rng(seed)
    lengths = rng.integers(30, 90, sessions)
    hours = rng.choice([6.0, 22.0, 48.0, 70.0], sessions)
    series = simulate(TRUTH, lengths, hours, rng, warmup=-0.2).series
    y = series.y.copy()
    y[[5, 70]] = np.nan  # left out by both filters
    return TrialSeries(series.session, y, series.rewarded, series.break_hours, series.excluded)


def _feed(live: LiveFilter, series: TrialSeries, sessions) -> list[tuple[np.ndarray, np.ndarray]]:
    ends = []
    for k, label in enumerate(series.labels):
        if label not in sessions:
            continue
        if k:
            live.start_session(series.break_hours[k])
        for y, rewarded in zip(series.y[series.session == label], series.rewarded[series.session == label]):
            live.add_trial(float(y), bool(rewarded))
        ends.append((live.mean.copy(), live.cov.copy()))
    return ends


@pytest.mark.parametrize("variant,warmup", [("error", "model"), ("outcome", "model"), ("error", "drop")])
def test_live_states_equal_the_batch_filter(variant, warmup):
    series = _series()
    prep = prepare(series, warmup=warmup)
    batch = evaluate(prep, TRUTH, variant, True)
    setup = LiveSetup(TRUTH, variant, True, batch.profiled.coef, batch.profiled.scale, warmup=warmup)
    ends = _feed(LiveFilter(setup), series, set(series.labels))
    for k, (mean, cov) in enumerate(ends):
        np.testing.assert_allclose(mean, batch.end_means[k], rtol=1e-9, atol=1e-12)
        np.testing.assert_allclose(cov, batch.end_covs[k], rtol=1e-9, atol=1e-15)


def _result_at(params: dict, variant: str, labels) -> ConsolidationResult:
    fit = ModelFit(variant, True, to_theta(params, TWO_RATE), params, 0.0, 12, True, "", None, 0)
    rows = [SessionEstimate(int(s), 0.6, 0.5, 0.9, "estimated") for s in labels]
    return ConsolidationResult("estimated", "", rows, 0, 0, fit, fit)


@pytest.mark.parametrize("variant", ["error", "outcome"])
def test_live_filter_continues_after_the_cached_fit(variant):
    series = _series(2)
    first = series.labels[:-1]
    head = TrialSeries(series.session[series.session != series.labels[-1]], series.y[series.session != series.labels[-1]],
                       series.rewarded[series.session != series.labels[-1]], series.break_hours[:-1], series.excluded[:-1])
    live = live_filter(head, _result_at(TRUTH, variant, first))
    last = _feed(live, series, {series.labels[-1]})[-1]
    # the same fixed setup run from the first trial must end in the same state
    again = LiveFilter(live.setup)
    np.testing.assert_allclose(_feed(again, series, set(series.labels))[-1][0], last[0], rtol=1e-9, atol=1e-12)
    frac = live.fraction()
    assert 0.0 <= frac.low <= frac.estimate <= frac.high <= 1.0
    assert frac.high - frac.low == pytest.approx(0.4) or frac.low == 0.0 or frac.high == 1.0  # cached width moved
    assert frac.trials_since_fit == int(np.sum(np.isfinite(series.y[series.session == series.labels[-1]])))


def test_a_filter_restored_from_its_json_state_goes_on_exactly_alike():
    series = _series(3)
    head_mask = series.session != series.labels[-1]
    head = TrialSeries(series.session[head_mask], series.y[head_mask], series.rewarded[head_mask],
                       series.break_hours[:-1], series.excluded[:-1])
    live = live_filter(head, _result_at(TRUTH, "outcome", series.labels[:-1]))
    restored = restore_filter(json.loads(json.dumps(filter_state(live))))  # through JSON, as the store keeps it
    ends = [_feed(f, series, {series.labels[-1]})[-1] for f in (live, restored)]
    np.testing.assert_array_equal(ends[0][0], ends[1][0])
    np.testing.assert_array_equal(ends[0][1], ends[1][1])
    assert live.fraction() == restored.fraction()


def test_empty_series_is_too_few_trials():
    empty = TrialSeries(np.array([], int), np.array([]), np.array([], bool), np.array([]), np.array([], bool))
    res = estimate_consolidation(empty, Options())
    assert res.status == "too few trials" and res.n_trials == 0
    block = consolidation_block(res)
    assert (block["estimate"], block["low"], block["high"], block["status"]) == (0.0, 0.0, 1.0, "too few trials")
    assert live_filter(empty, res) is None
