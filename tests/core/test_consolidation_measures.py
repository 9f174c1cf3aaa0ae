"""Transparent measures on small hand-made series (expected values worked out by hand)."""

from __future__ import annotations

import numpy as np
import pytest

from monitor.core.consolidation.measures import (
    outcome_sensitivity,
    session_summaries,
    trend,
)
from monitor.core.consolidation.model import TrialSeries


def _series(excluded=(False, False, False)) -> TrialSeries:
    session = np.array([1, 1, 1, 1, 2, 2, 2, 2, 3, 3, 3])
    y = np.array([-0.4, -0.2, 0.0, 0.2, -0.3, -0.1, 0.1, np.nan, 0.5, 0.0, 0.0])
    rewarded = np.abs(y) <= 0.15
    return TrialSeries(session, y, rewarded, np.array([0.0, 24.0, 24.0]), np.array(excluded))


def test_session_summaries_by_hand():
    rows = session_summaries(_series())
    assert [r.session for r in rows] == [1, 2, 3]
    assert [r.trials for r in rows] == [4, 3, 3]  # the NaN trial is left out
    assert rows[0].median_abs_error == pytest.approx(0.2)  # |y| sorted: 0, .2, .2, .4
    ratio = np.exp([-0.4, -0.2, 0.0, 0.2])
    assert rows[0].cv == pytest.approx(np.std(ratio, ddof=1) / np.mean(ratio))
    assert rows[0].hit_rate == pytest.approx(0.25)




def test_trend_matches_scipy_linregress():
    from scipy.stats import linregress

    values = [0.5, 0.42, 0.44, 0.35, 0.3, 0.31, 0.22]
    out = trend(values, last=7)
    ref = linregress(np.arange(7), values)  # scipy.stats: least-squares slope and its standard error
    assert out.slope == pytest.approx(ref.slope)
    from scipy.stats import t as student_t

    half = student_t.ppf(0.95, 5) * ref.stderr
    assert (out.low, out.high) == pytest.approx((ref.slope - half, ref.slope + half))


def test_outcome_sensitivity_by_hand():
    out = outcome_sensitivity(_series())
    # pairs within sessions: s1 (-.4,-.2) (-.2,0) (0,.2); s2 (-.3,-.1) (-.1,.1); s3 (.5,0) (0,0)
    # hits (|y|<=.15) on the first trial of: (0,.2), (-.1,.1), (0,0) -> steps .2 .2 0; misses: .2 .2 .2 .5
    assert out.pairs == 7
    assert out.after_hit == pytest.approx(0.4 / 3)
    assert out.after_miss == pytest.approx(1.1 / 4)
    assert out.difference == pytest.approx(1.1 / 4 - 0.4 / 3)


def test_excluded_sessions_are_left_out_of_the_summaries():
    assert [r.session for r in session_summaries(_series((False, True, False)))] == [1, 3]
