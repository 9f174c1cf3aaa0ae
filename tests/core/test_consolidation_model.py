"""Preparation of trial series, parameter transforms, fractions' quantiles and the forecast's closed loop."""

from __future__ import annotations

import numpy as np
import pytest

from monitor.core.consolidation.estimate import _quantiles_with_undefined, session_map
from monitor.core.consolidation.model import RANGES, TWO_RATE, TrialSeries, prepare, to_natural, to_theta
from monitor.core.consolidation.kalman import StateSpace

# Smith, Ghazizadeh & Shadmehr 2006 parameters (REFERENCES.md, [memory])
A_F, B_F, A_S, B_S = 0.92, 0.03, 0.996, 0.004


def _smith_model() -> StateSpace:
    return StateSpace(np.diag([A_F, A_S]), np.array([B_F, B_S]), np.ones(2), 1.0, np.zeros((2, 2)),
                      np.zeros(2), np.zeros((2, 2)))


@pytest.mark.parametrize("trials,expected", [(1, 0.034), (10, 0.21863), (100, 0.43241), (400, 0.56024)])
def test_closed_loop_reproduces_smith_2006_check_values(trials, expected):
    # e = f - x with f = 1: input slope -1, drive B * f (REFERENCES.md check values [checked])
    model = _smith_model()
    phi, const = session_map(model, -1.0, model.input_gain * 1.0, trials)
    x = phi @ np.zeros(2) + const
    assert x.sum() == pytest.approx(expected, abs=6e-6)


def test_closed_loop_steady_state_and_eigenvalues_match_smith_2006():
    model = _smith_model()
    phi, const = session_map(model, -1.0, model.input_gain, 1)
    # eigenvalues of [[A_f - B_f, -B_f], [-B_s, A_s - B_s]]: 0.888837 and 0.993163 [checked]
    np.testing.assert_allclose(np.sort(np.linalg.eigvals(phi)), [0.888837, 0.993163], atol=1e-6)
    phi, const = session_map(model, -1.0, model.input_gain, 20000)
    # x_ss = 0.578947 with x_f = 0.157895, x_s = 0.421053 [checked]
    np.testing.assert_allclose(const, [0.157895, 0.421053], atol=1e-6)


def test_transforms_round_trip_and_stay_in_range():
    params = {"a_f": 0.97, "b_f": 0.03, "c": 2e-4, "slow_leak": 1e-5, "tau_b": 20.0, "q_f": 1e-3, "q_s": 1e-6}
    back = to_natural(to_theta(params, TWO_RATE), TWO_RATE)
    for name, value in params.items():
        assert back[name] == pytest.approx(value, rel=1e-9)
    for extreme in (-50.0, 50.0):
        out = to_natural(np.full(len(TWO_RATE), extreme), TWO_RATE)
        for name, value in out.items():
            low, high, _ = RANGES[name]
            assert low <= value <= high


def _series() -> TrialSeries:
    session = np.repeat([1, 2, 3, 4], [4, 3, 5, 2])
    y = np.array([-1.0, -0.9, np.nan, -0.8, -0.7, -0.6, -0.5, -0.4, -0.3, -0.2, -0.1, 0.0, 0.05, 0.0])
    rewarded = np.abs(y) < 0.25
    return TrialSeries(session, y, rewarded, np.array([0.0, 20.0, 30.0, 40.0]), np.array([False, False, True, False]))


def test_prepare_drops_excluded_and_nonfinite_and_merges_breaks():
    prep = prepare(_series())
    assert prep.labels.tolist() == [1, 2, 4]
    assert prep.layout_lengths.tolist() == [3, 3, 2]
    assert prep.dropped_trials == 1
    # the excluded session's break is added to the next kept session's break
    assert prep.hours.tolist() == [0.0, 20.0, 70.0]
    assert prep.effects.shape[0] == 4  # offset, two warm-up terms, drift


def test_prepare_can_leave_warmup_trials_out():
    prep = prepare(_series(), warmup="drop", warmup_trials=1)
    assert prep.layout_lengths.tolist() == [2, 2, 1]
    assert prep.effects.shape[0] == 2  # offset, drift
    np.testing.assert_allclose(prep.y[:2], [-0.9, -0.8])


def test_from_intervals_uses_log_ratio_and_keeps_bad_intervals_out():
    series = TrialSeries.from_intervals(np.array([1, 1, 1]), np.array([650.0, 1300.0, -5.0]), 650.0,
                                        np.array([True, False, False]), np.array([0.0]), np.array([False]))
    np.testing.assert_allclose(series.y[:2], [0.0, np.log(2.0)])
    assert prepare(series).dropped_trials == 1


def test_undefined_fraction_draws_widen_the_interval_both_ways():
    samples = np.column_stack([np.full(100, 0.5), np.r_[np.full(60, 0.5), np.full(40, np.nan)]])
    low, _, high = _quantiles_with_undefined(samples)
    assert (low[0], high[0]) == (0.5, 0.5)
    assert low[1] == 0.0 and high[1] == 1.0
