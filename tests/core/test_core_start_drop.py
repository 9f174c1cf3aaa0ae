"""Start-of-session drop: end of one session against the start of the next, warm-up apart, Newcombe interval."""

from __future__ import annotations

import pytest
from statsmodels.stats.proportion import confint_proportions_2indep

from monitor.core.session.binomial import newcombe_difference
from monitor.core.session.start_drop import start_drops


@pytest.mark.parametrize("k1, n1, k2, n2", [(16, 20, 9, 20), (0, 20, 5, 15), (20, 20, 20, 20), (56, 70, 48, 80)])
def test_newcombe_difference_matches_statsmodels(k1, n1, k2, n2):
    d, low, high = newcombe_difference(k1, n1, k2, n2)
    # statsmodels' "newcomb" method is Newcombe's hybrid score interval (method 10)
    ref_low, ref_high = confint_proportions_2indep(k1, n1, k2, n2, method="newcomb", compare="diff")
    assert d == pytest.approx(k1 / n1 - k2 / n2)
    assert (low, high) == (pytest.approx(ref_low), pytest.approx(ref_high))


def test_newcombe_worked_example():
    # Newcombe (1998) Stat Med 17:873, example 56/70 - 48/80, method 10: 0.0524 to 0.3339 (from memory)
    _, low, high = newcombe_difference(56, 70, 48, 80)
    assert (round(low, 4), round(high, 4)) == (0.0524, 0.3339)


def test_newcombe_needs_trials_on_both_sides():
    with pytest.raises(ValueError, match="both sides"):
        newcombe_difference(0, 0, 3, 5)


def test_warm_up_is_set_apart_and_windows_are_cut():
    # session 1 ends 16/20 (its first 4 trials fall outside the window); session 2: 5 warm-up misses, then 9/20
    drops = start_drops([(1, [True] * 4 + [True] * 16 + [False] * 4), (2, [False] * 5 + [True] * 9 + [False] * 11)])
    assert len(drops) == 1
    drop = drops[0]
    assert (drop.session, drop.warmup_trials) == (2, 5)
    assert drop.drop == pytest.approx(16 / 20 - 9 / 20)  # hand count: the previous session's last 20 are 16 hits
    ref_low, ref_high = confint_proportions_2indep(16, 20, 9, 20, method="newcomb", compare="diff")  # statsmodels
    assert (drop.low, drop.high) == (pytest.approx(ref_low), pytest.approx(ref_high))


def test_sessions_without_trials_are_skipped_and_a_short_start_has_no_drop():
    drops = start_drops([(1, [True] * 10), (2, []), (3, [False] * 3), (4, [True] * 8)], warmup=5)
    # 2 has no trials (skipped); 3 has none after its warm-up (no drop); 4 is compared with 3's last trials
    assert [d.session for d in drops] == [4]
    assert drops[0].drop == pytest.approx(0.0 - 3 / 3)  # 0/3 before, 3/3 after the warm-up: a gain, negative
