"""mock_rig's manipulations: what each does to the fast and slow states, and the simulated truth."""

from __future__ import annotations

import json
import math
from dataclasses import replace

import numpy as np
import pytest
from scipy import stats

from mock_rig import scenario
from mock_rig.__main__ import main as mock_main
from mock_rig.learner import Learner, LearnerParams
from mock_rig.manipulations import (ManipulatedLearner, expected_hit_rate, final_stage_session, finish, parse_plan,
                                    start)

PROTOCOL = replace(scenario.two_press_protocol(650), max_trials=120, max_minutes=15.0)


def _learner(seed: int = 1) -> ManipulatedLearner:
    f = math.log(650 / 250)
    return ManipulatedLearner(LearnerParams(), np.random.default_rng(seed), x_fast=0.4 * f, x_slow=0.6 * f,
                              practice=20000)


def test_inactivation_leaves_the_slow_state_alone_for_one_session():
    learner = _learner()
    fast, slow = learner.x_fast, learner.x_slow
    start(learner, "inactivate_fast")
    session = final_stage_session(learner, PROTOCOL, learner.rng)
    means = [m for m, _ in learner.record]
    assert means and max(abs(m - slow) for m in means) < 1e-12     # output from the slow state alone
    assert learner.x_fast == fast and learner.x_slow == pytest.approx(slow)   # fast frozen, nothing transferred
    finish(learner)
    start(learner, None)
    after = final_stage_session(learner, PROTOCOL, learner.rng)
    assert learner.record[0][0] == pytest.approx(fast + slow)       # back the next session
    assert session.expected_hit_rate < after.expected_hit_rate - 0.2


def test_lesion_takes_the_fast_state_for_good_and_a_vehicle_removes_nothing():
    learner = _learner()
    start(learner, "lesion_fast")
    final_stage_session(learner, PROTOCOL, learner.rng)
    finish(learner)
    learner.start_session(23.0)
    start(learner, None)
    final_stage_session(learner, PROTOCOL, learner.rng)
    assert learner.x_fast == 0.0 and learner.fast_lost
    plain = Learner(LearnerParams(), np.random.default_rng(3), 0.3, 0.6, practice=20000)
    treated = ManipulatedLearner(LearnerParams(), np.random.default_rng(3), 0.3, 0.6, practice=20000)
    start(treated, "vehicle")
    a = final_stage_session(ManipulatedLearner.like(plain), PROTOCOL, plain.rng)
    b = final_stage_session(treated, PROTOCOL, treated.rng)
    assert a.records == b.records                                   # the same animal, the same session


def test_expected_hit_rate_is_the_normal_probability_of_the_window():
    record = [(0.9, 0.2), (1.1, 0.25), (0.5, 0.0)]
    lo, hi = math.log(520 / 250), math.log(780 / 250)
    # scipy.stats.norm: P(lo <= N(mean, sd) <= hi)
    want = np.mean([stats.norm.cdf(hi, 0.9, 0.2) - stats.norm.cdf(lo, 0.9, 0.2),
                    stats.norm.cdf(hi, 1.1, 0.25) - stats.norm.cdf(lo, 1.1, 0.25), 0.0])
    assert expected_hit_rate(record, 520, 780, 250) == pytest.approx(want)
    assert expected_hit_rate([], 520, 780, 250) is None


def test_history_with_a_plan_from_the_command_line(tmp_path, capsys):
    assert parse_plan("alder:10:inactivate_fast") == ("alder", 10, "inactivate_fast")
    for bad in ("alder:0:vehicle", "alder:3", "alder:3:unknown"):
        with pytest.raises(ValueError):
            parse_plan(bad)
    assert mock_main(["history", "--animals", "1", "--days", "6", "--out", str(tmp_path),
                      "--manipulate", "alder:3:vehicle"]) == 0
    truth = json.loads((tmp_path / "truth.json").read_text())
    assert truth["manipulations"] == {"alder": {"3": "vehicle"}}
    assert [s["manipulation"] for s in truth["animals"]["alder"]["sessions"]][:4] == [None, None, "vehicle", None]
