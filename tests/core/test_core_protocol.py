"""Protocol files: the contract's keys, the documented extras, and errors that name file:line:key."""

from __future__ import annotations

import re
from pathlib import Path

import pytest

from drivers.config import ConfigError
from monitor.core.protocol import HIGHER_IS_BETTER, parse_protocol

CONTRACT_EXAMPLE = """
[protocol]
name = "two-press 650 ms"
version = 3              # bump on any change; sessions record the version in force
task = "two_press"       # two_press | joystick_hold
target_ms = 650
tolerance = 0.2          # hit when |interval - target| <= tolerance * target
trial_timeout_ms = 3000  # a first press with no second press within this is a lone press

[plateau]
rule = "consecutive_sessions"
min_hit_rate = 0.5
sessions = 3
"""


def test_contract_example_parses_as_written():
    # docs/protocol.md, copied verbatim (comments included)
    p = parse_protocol(CONTRACT_EXAMPLE, "c.toml")
    assert (p.name, p.version, p.task) == ("two-press 650 ms", 3, "two_press")
    stage = p.final_stage
    assert stage.name == "main" and len(p.stages) == 1
    assert stage.window_low_ms == pytest.approx(520) and stage.window_high_ms == pytest.approx(780)
    assert stage.trial_timeout_ms == 3000
    assert p.plateau.rule == "consecutive_sessions" and p.plateau.threshold == 0.5 and p.plateau.sessions == 3
    assert p.plateau.measure == "hit_rate" and HIGHER_IS_BETTER[p.plateau.measure]


def test_window_ms_and_default_timeout():
    p = parse_protocol('[protocol]\nname="x"\nversion=1\ntask="two_press"\ntarget_ms=650\n'
                       'window_ms=[520, 800]\n[plateau]\nmin_hit_rate=0.4\n', "w.toml")
    s = p.final_stage
    assert (s.window_low_ms, s.window_high_ms, s.tolerance) == (520, 800, None)
    assert s.trial_timeout_ms == 3 * 650  # documented default: 3 x target


def test_stages_inherit_and_final_stage_is_last():
    p = parse_protocol("""
[protocol]
name = "shaped"
version = 1
task = "two_press"
target_ms = 700
tolerance = 0.4
iti_ms = 1000

[[stages]]
name = "wide"

[[stages]]
name = "adaptive"
tolerance = 0.3
adaptive = { every = 20, target_rate = 0.5, step = 0.02, min_tolerance = 0.1, max_tolerance = 0.4 }

[[stages]]
name = "final"
target_ms = 800
window_ms = [700, 900]
premature_ms = 150

[eligibility]
rule = "sessions_since_plateau"
min_sessions = 5
nested = { a = 1 }
""", "s.toml")
    assert [s.name for s in p.stages] == ["wide", "adaptive", "final"]
    wide, adaptive, final = p.stages
    assert wide.window_low_ms == pytest.approx(420) and wide.iti_ms == 1000
    assert adaptive.adaptive.every == 20 and adaptive.adaptive.min_tolerance == 0.1
    assert final.target_ms == 800 and (final.window_low_ms, final.window_high_ms) == (700, 900)
    assert final.premature_ms == 150 and final.trial_timeout_ms == 2400  # 3 x its own target
    assert p.final_stage is final
    assert p.eligibility == {"rule": "sessions_since_plateau", "min_sessions": 5, "nested": {"a": 1}}
    assert p.fixed_window("final") == (700, 900)


BAD = [
    ('[protocol]\nname="x"\nversion=1\ntask="two_press"\ntarget_ms=650\ntolerance=0.2\ncolour="red"\n',
     4 + 3, "[protocol] colour", "unknown key"),
    ('[protocol]\nname="x"\nversion=1\ntask="two_press"\ntarget_ms="650"\ntolerance=0.2\n',
     5, "[protocol] target_ms", "expected"),
    ('[protocol]\nname="x"\nversion=1\ntask="lever"\ntarget_ms=650\ntolerance=0.2\n',
     4, "[protocol] task", "expected one of"),
    ('[protocol]\nname="x"\nversion=1\ntask="two_press"\ntarget_ms=650\ntolerance=0.2\nwindow_ms=[1,2]\n',
     7, "[protocol] window_ms", "not both"),
    (('[protocol]\nname="x"\nversion=1\ntask="two_press"\ntarget_ms=650\ntolerance=0.2\n'
     '[[stages]]\nname="a"\n[[stages]]\nname="b"\ntarget_ms=-3\n'), 11, "[[stages]] #2 target_ms", "> 0"),
    (('[protocol]\nname="x"\nversion=1\ntask="two_press"\ntarget_ms=650\ntolerance=0.2\n'
     '[[stages]]\nname="a"\n[[stages]]\nname="b"\nwindw_ms=[1, 2]\n'), 11, "[[stages]] #2 windw_ms", "unknown key"),
    (('[protocol]\nname="x"\nversion=1\ntask="two_press"\ntarget_ms=650\ntolerance=0.2\n'
     '[[stages]]\nname="a"\n[[stages]]\nname="a"\n'), 10, "[[stages]] #2 name", "twice"),
    (('[protocol]\nname="x"\nversion=1\ntask="two_press"\ntarget_ms=650\ntolerance=0.2\n'
     '[plateau]\nmin_hit_rate=1.5\n'), 8, "[plateau] min_hit_rate", "between 0 and 1"),
    (('[protocol]\nname="x"\nversion=1\ntask="two_press"\ntarget_ms=650\ntolerance=0.2\n'
     '[plateau]\nrule="change_point"\nmeasure="cv"\n'), 9, "[plateau] measure", "trial-by-trial"),
    (('[protocol]\nname="x"\nversion=1\ntask="two_press"\ntarget_ms=650\ntolerance=0.2\n'
     '[plateau]\nrule="consecutive_sessions"\n'), None, "[plateau] min_hit_rate", "threshold"),
    (('[protocol]\nname="x"\nversion=1\ntask="two_press"\ntarget_ms=650\ntolerance=0.2\n'
     '[plateau]\nrule="plateau_by_eye"\n'), 8, "[plateau] rule", "expected one of"),
    ('[protocol]\nname="x"\nversion=1\ntask="two_press"\ntarget_ms=650\ntolerance=0.2\n[sesion]\nmax_trials=5\n',
     7, "sesion", "unknown table"),
    (('[protocol]\nname="x"\nversion=1\ntask="two_press"\ntarget_ms=650\ntolerance=0.2\n'
     '[[stages]]\nname="a"\nadaptive={every=10, target_rate=0.5, speed=2}\n'), 9, "[[stages]] #1 adaptive speed",
     "unknown key"),
    ('[protocol]\nname="x"\nversion=1\ntask="two_press"\ntarget_ms=650\n', 1, "[protocol] tolerance", "missing"),
]


@pytest.mark.parametrize("text, line, key, words", BAD)
def test_mistakes_name_file_line_and_key(text, line, key, words):
    with pytest.raises(ConfigError) as caught:
        parse_protocol(text, "lab/p.toml")
    error = caught.value
    assert error.path == "lab/p.toml"
    assert error.key == key
    if line is not None:
        assert error.line == line
    assert words in error.message
    assert str(error).startswith("lab/p.toml")


def test_docs_example_parses():
    # The example in docs/protocol.md must stay a valid protocol.
    text = (Path(__file__).parents[2] / "docs" / "protocol.md").read_text()
    blocks = re.findall(r"```toml\n(.*?)```", text, re.DOTALL)
    assert blocks
    p = parse_protocol(blocks[0], "docs/protocol.md")
    assert len(p.stages) >= 2 and p.plateau.measure in ("hit_rate", "fixed_window_fraction",
                                                        "median_abs_log_error", "cv")


@pytest.mark.parametrize("key, value", [("tolerance", "inf"), ("tolerance", "nan"), ("target_ms", "inf")])
def test_a_number_that_is_not_finite_is_refused(key, value):
    # TOML's inf and nan are floats (toml.io, v1.0.0: "Float"); no window or target can be infinite
    text = '[protocol]\nname="x"\nversion=1\ntask="two_press"\ntarget_ms=650\ntolerance=0.2\n'
    text = text.replace(f"{key}=650" if key == "target_ms" else f"{key}=0.2", f"{key}={value}")
    with pytest.raises(ConfigError, match="finite"):
        parse_protocol(text, "p.toml")
