"""Wilson intervals against scipy, statsmodels and the published table."""

from __future__ import annotations

import subprocess
import sys

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.stats import binomtest
from statsmodels.stats.proportion import proportion_confint

from monitor.core.session.binomial import wilson

# ../shared/REFERENCES.md, "Binomial intervals for rolling hit rates" [checked: scipy 1.17.1, statsmodels 0.15.0]
TABLE = [
    (7, 50, (0.0581917003, 0.2673960025), (0.0695083343, 0.2618619371)),
    (40, 50, (0.6628168916, 0.8996977625), (0.6696289407, 0.8875624998)),
    (0, 20, (0.0, 0.1684334710), (0.0, 0.1611251581)),
    (85, 100, (0.7646924999, 0.9135456144), (0.7671644041, 0.9069401472)),
]


@pytest.mark.parametrize("k, n, exact, score", TABLE)
def test_published_table(k, n, exact, score):
    # values from REFERENCES.md, given to 10 decimals
    assert wilson(k, n) == pytest.approx(score, abs=1e-10)


@pytest.mark.slow
@settings(max_examples=200, deadline=None)
@given(st.integers(1, 400).flatmap(lambda n: st.tuples(st.integers(0, n), st.just(n))),
       st.sampled_from([0.8, 0.9, 0.95, 0.99]))
def test_against_scipy_and_statsmodels(kn, confidence):
    k, n = kn
    # scipy.stats.binomtest(...).proportion_ci, method 'wilson'
    ref_w = binomtest(k, n).proportion_ci(confidence_level=confidence, method="wilson")
    # statsmodels proportion_confint, method 'wilson' (its default is Wald: name the method)
    sm_w = proportion_confint(k, n, alpha=1 - confidence, method="wilson")
    assert wilson(k, n, confidence) == pytest.approx((ref_w.low, ref_w.high), abs=1e-12)
    assert wilson(k, n, confidence) == pytest.approx(sm_w, abs=1e-12)


def test_no_trials_and_bad_input():
    assert wilson(0, 0) == (0.0, 1.0)
    assert wilson(5, 5)[1] == 1.0 and wilson(0, 5)[0] == 0.0
    with pytest.raises(ValueError):
        wilson(6, 5)
    with pytest.raises(ValueError):
        wilson(1, 5, confidence=1.0)


def test_live_path_does_not_import_scipy():
    # the recorder and the live view must start without paying scipy's import (STACK-NOTES.md: ~2 s)
    code = ("import sys; from monitor.core.session.binomial import wilson; wilson(3, 10); "
            "import monitor.core.session.animal_report, monitor.core.session.plateau, monitor.core.session.live_stats, monitor.core.session.trials; "
            "print('scipy' in sys.modules)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout
    assert out.strip() == "False"
