"""View models, the tile's text and the dialogs' checks: pure code, no widgets."""

from __future__ import annotations

import math

import numpy as np
import pytest

from monitor.ui import sample
from monitor.ui.models import Connection, HistogramData, RigSetup, RigTileState, Roster, Severity
from monitor.ui.tile import clock_text, tile_texts
from monitor.ui.validation import (
    check_in_problems,
    condition_problems,
    exclusion_problems,
    rig_setup_problems,
    unusual_box_warning,
)

ROSTER = Roster(animals=("alder", "birch"), rigs=("box-01", "box-02", "box-03"), stages=("shaping", "final"),
                usual_rigs={"alder": ("box-01", "box-02")}, occupied={"box-03": "birch"})


def test_every_connection_state_has_its_own_word_shape_and_colour():
    words = {c.word for c in Connection}
    shapes = {c.shape for c in Connection}
    colours = {c.colour for c in Connection}
    assert len(words) == len(shapes) == len(colours) == len(Connection)


def test_only_urgent_alerts_are_loud():
    assert [s for s in Severity if s.loud] == [Severity.URGENT]


def test_histogram_shapes_are_checked():
    with pytest.raises(ValueError):
        RigTileState("box-01", None, Connection.LIVE, hist_counts=(1, 2), hist_edges_ms=(0.0, 1.0))
    with pytest.raises(ValueError):
        HistogramData(np.arange(4.0), np.zeros(3), previous=np.zeros(2))


def test_tile_texts_show_dashes_not_zeros_for_missing_figures():
    texts = tile_texts(RigTileState("box-12", None, Connection.IDLE))
    assert texts.animal == "no animal"
    assert texts.clock == "no session"
    assert texts.hit_rate == "hit –" and texts.last_interval == "last –"
    assert texts.state == "idle" and texts.badge == ""


def test_tile_texts_for_a_running_session():
    state = RigTileState("box-03", "cedar", Connection.LIVE, session_seconds=3725.9, trials_today=341,
                         hit_rate=0.62, hit_low=0.48, hit_high=0.745, last_interval_ms=648.4,
                         hist_counts=(1, 2), hist_edges_ms=(0.0, 750.0, 1500.0), window_low_ms=520,
                         window_high_ms=780, alert_count=2, alert_severity=Severity.URGENT)
    t = tile_texts(state)
    assert (t.title, t.animal, t.state, t.clock, t.trials) == ("box-03", "cedar", "live", "1:02:05", "341")
    assert t.hit_rate == "hit 62 %" and t.hit_interval == "95 % CI 48–74 %"
    assert t.last_interval == "last 648 ms" and t.window == "window 520–780 ms"
    assert (t.axis_low, t.axis_high, t.badge) == ("0", "1500 ms", "2")


@pytest.mark.parametrize("seconds, text", [(0, "0:00:00"), (59.9, "0:00:59"), (3600, "1:00:00"),
                                           (None, "no session"), (math.nan, "no session"), (-1, "no session")])
def test_clock_text(seconds, text):
    assert clock_text(seconds) == text


def test_sample_rolling_band_is_statsmodels_wilson():
    # outside check: statsmodels' proportion_confint(method="wilson") gives the same band
    from statsmodels.stats.proportion import proportion_confint

    today = sample.today_state(np.random.default_rng(9), trials=120)
    n = np.minimum(np.arange(1, 121), 50)
    k = np.round(today.rolling_rate * n)
    low, high = proportion_confint(k, n, alpha=0.05, method="wilson")
    np.testing.assert_allclose(today.rolling_low, low, atol=1e-3)
    np.testing.assert_allclose(today.rolling_high, high, atol=1e-3)


def test_check_in_accepts_a_good_record():
    assert check_in_problems(ROSTER, "alder", "box-01", "R. Okafor", 27.5, "final") == []


def test_check_in_names_each_field_to_fix():
    problems = check_in_problems(ROSTER, "", "", " ", 0.0, "")
    assert [p.split(":")[0] for p in problems] == ["Animal", "Box", "Operator", "Weight", "Stage"]


def test_check_in_refuses_an_occupied_box_and_a_double_check_in():
    assert any("check it out first" in p for p in check_in_problems(ROSTER, "alder", "box-03", "me", 30, "final"))
    assert any("already checked in at box-03" in p
               for p in check_in_problems(ROSTER, "birch", "box-01", "me", 30, "final"))
    # the animal already in that box may be checked in again there (e.g. after a correction)
    assert check_in_problems(ROSTER, "birch", "box-03", "me", 30, "final") == []


def test_check_in_refuses_unknown_names_and_weights_out_of_range():
    assert any("not in this cohort" in p for p in check_in_problems(ROSTER, "zed", "box-01", "me", 30, "final"))
    assert any("Weight" in p for p in check_in_problems(ROSTER, "alder", "box-01", "me", math.nan, "final"))
    assert any("Stage" in p for p in check_in_problems(ROSTER, "alder", "box-01", "me", 30, "bogus"))


def test_unusual_box_warning():
    assert "usually in box-01, box-02" in unusual_box_warning(ROSTER, "alder", "box-03")
    assert unusual_box_warning(ROSTER, "alder", "box-02") == ""
    assert unusual_box_warning(ROSTER, "birch", "box-01") == ""   # no usual boxes known: no warning


def test_exclusion_needs_a_reason_and_conditions_need_what():
    assert exclusion_problems("   ") and exclusion_problems("lever stuck") == []
    assert condition_problems("", "", None)[0].startswith("What")
    assert condition_problems("saline", "", -1.0)[0].startswith("Volume")
    assert condition_problems("muscimol", "0.5 mg/kg", 0.5) == []


GOOD_RIG = RigSetup(name="box-05", source="serial", path="/dev/ttyACM4", serial_number="A1B2",
                    valve_ul_per_ms=0.08, protocol_path="/lab/two_press.toml")


def test_rig_setup_accepts_good_settings():
    assert rig_setup_problems(GOOD_RIG, {"box-01"}) == []


@pytest.mark.parametrize("change, field", [
    ({"name": ""}, "Name"), ({"name": "box 5!"}, "Name"), ({"name": "box-01"}, "Name"),
    ({"source": "usb"}, "Source"), ({"path": ""}, "Source"),
    ({"valve_ul_per_ms": 50.0}, "Valve calibration"), ({"valve_ul_per_ms": math.inf}, "Valve calibration"),
    ({"protocol_path": ""}, "Protocol"),
])
def test_rig_setup_refuses_bad_settings_naming_the_field(change, field):
    from dataclasses import replace

    problems = rig_setup_problems(replace(GOOD_RIG, **change), {"box-01"})
    assert len(problems) == 1 and problems[0].startswith(field + ":")


def test_rig_setup_asks_whether_files_exist():
    missing = {"/lab/log.txt", "/lab/map.toml"}
    setup = RigSetup(name="box-06", source="file", path="/lab/log.txt", mapping_path="/lab/map.toml",
                     protocol_path="/lab/two_press.toml")
    problems = rig_setup_problems(setup, exists=lambda p: p not in missing)
    assert [p.split(":")[0] for p in problems] == ["Source", "Mapping"]


@pytest.mark.parametrize("value, ceiling", [(0.3, 0.3), (1, 1), (1.01, 1.5), (3, 3), (7.2, 7.5), (63, 65),
                                            (87.15, 90), (315, 350), (1001, 1500), (0, 1), (-4, 1), (math.nan, 1)])
def test_nice_ceiling_rounds_up_to_half_the_leading_power(value, ceiling):
    from monitor.ui.plots import nice_ceiling

    assert nice_ceiling(value) == pytest.approx(ceiling)
