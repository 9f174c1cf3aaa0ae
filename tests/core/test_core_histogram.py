"""Histograms and running statistics against numpy on the same data."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from monitor.core.session.histogram import Histogram, IntervalHistograms, linear_edges, log_edges
from monitor.core.session.rolling import RollingRate, RunningMedian, RunningMoments, WindowMedian

values = st.lists(st.one_of(st.floats(-100, 3000, allow_nan=False), st.sampled_from([0.0, 50.0, 2000.0, 1250.0])),
                  max_size=300)


@pytest.mark.slow
@settings(max_examples=200, deadline=None)
@given(values, st.integers(1, 80))
def test_linear_bins_equal_numpy_histogram(data, bins):
    h = Histogram(linear_edges(0.0, 2000.0, bins))
    h.extend(data)
    # numpy.histogram with bins=int and range=: the reference for bin membership and edges
    counts, edges = np.histogram(np.array(data, float), bins=bins, range=(0.0, 2000.0))
    assert np.array_equal(h.counts, counts)
    assert np.array_equal(h.edges, edges)
    assert h.outside == sum(1 for v in data if not 0.0 <= v <= 2000.0)


@pytest.mark.slow
@settings(max_examples=200, deadline=None)
@given(values, st.integers(1, 80))
def test_log_bins_equal_numpy_histogram(data, bins):
    edges = log_edges(20.0, 5000.0, bins)
    h = Histogram(edges)
    h.extend(data)
    counts, _ = np.histogram(np.array(data, float), bins=edges)  # numpy.histogram with explicit edges
    assert np.array_equal(h.counts, counts)


def test_values_on_edges_and_nan():
    h = Histogram(linear_edges(0, 10, 5))
    h.extend([0.0, 2.0, 10.0, 10.000001, -0.0, float("nan")])
    assert h.counts.tolist() == [2, 1, 0, 0, 1] and h.outside == 2
    with pytest.raises(ValueError):
        h.counts[0] = 5  # snapshots are read-only


def test_today_against_previous_sessions():
    edges = linear_edges(0, 1000, 10)
    hist = IntervalHistograms(edges, previous=[100, 150, 950])
    for v in (120, 130, float("nan")):
        hist.add(v)
    snap = hist.snapshot()
    assert snap.today.tolist() == [0, 2] + [0] * 8 and snap.previous.tolist() == [0, 2] + [0] * 7 + [1]
    hist.end_session()
    assert hist.snapshot().previous[1] == 4 and hist.snapshot().today.sum() == 0


@pytest.mark.slow
@settings(max_examples=200, deadline=None)
@given(st.lists(st.floats(0.001, 1e5), min_size=1, max_size=300), st.integers(1, 40))
def test_running_figures_equal_numpy(data, size):
    median, window, moments = RunningMedian(), WindowMedian(size), RunningMoments()
    for i, v in enumerate(data, start=1):
        median.add(v)
        window.add(v)
        moments.add(v)
        seen = np.array(data[:i])
        # numpy.median / numpy.std(ddof=1) / numpy.mean as the batch reference
        assert median.median == np.median(seen)
        assert window.median == np.median(seen[-size:])
    assert moments.mean == pytest.approx(np.mean(data), rel=1e-9)
    if len(data) > 1:
        cv = np.std(data, ddof=1) / np.mean(data)
        assert moments.cv == pytest.approx(cv, rel=1e-6, abs=1e-9)
    else:
        assert math.isnan(moments.cv)


@settings(max_examples=100, deadline=None)
@given(st.lists(st.booleans(), max_size=200), st.integers(1, 50))
def test_rolling_rate_is_the_last_n(outcomes, size):
    rate = RollingRate(size)
    for o in outcomes:
        rate.add(o)
    last = outcomes[-size:]
    assert rate.count == len(last) and rate.hits == sum(last)
    if last:
        assert rate.rate == sum(last) / len(last)
