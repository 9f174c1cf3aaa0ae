"""Eligibility rule parsing: keys, types, the model-figure safeguard, file:line:key errors."""

from __future__ import annotations

import re
from pathlib import Path

import pytest

from drivers.config import ConfigError, TomlFile
from monitor.core.eligibility.rules import parse_eligibility
from monitor.core.protocol import parse_protocol

DOCS = Path(__file__).resolve().parents[2] / "docs" / "eligibility.md"

BASE = """\
[eligibility]
cohort = "spring"

[eligibility.groups.early]
label = "plateaued, not consolidated"
max_sessions_since_plateau = 4
max_interval_error = 0.2
max_slow_fraction = 0.5

[eligibility.groups.late]
label = "consolidated"
min_sessions_since_plateau = 8
min_slow_fraction = 0.8
slow_fraction_basis = "estimate"
slow_fraction_status = ["estimated"]
"""


def parse(text: str):
    doc = TomlFile(text, "cohort.toml")
    return parse_eligibility(doc.data.get("eligibility", {}), doc)


def line_of(text: str, needle: str) -> int:
    return next(n for n, line in enumerate(text.splitlines(), 1) if line.startswith(needle))


def test_groups_bounds_and_defaults():
    rule = parse(BASE)
    assert [g.name for g in rule.groups] == ["early", "late"]
    early, late = rule.groups
    assert early.label == "plateaued, not consolidated" and early.plateau
    assert [(b.figure, b.low, b.high) for b in early.bounds] == [
        ("sessions_since_plateau", None, 4), ("interval_error", None, 0.2)]
    assert early.slow.high == 0.5 and early.slow.basis == "interval" and early.slow.statuses == ("estimated",)
    assert late.slow.low == 0.8 and late.slow.basis == "estimate"
    assert rule.cohort == "spring" and rule.warn_sessions == 2


def test_empty_table_means_no_rule():
    assert parse_eligibility({}, None) is None


def test_model_figure_alone_is_refused_with_file_line_key():
    text = BASE.replace("min_sessions_since_plateau = 8\n", "")
    with pytest.raises(ConfigError) as caught:
        parse(text)
    error = caught.value
    assert error.path == "cohort.toml"
    assert error.line == line_of(text, "min_slow_fraction")
    assert error.key == "[eligibility.groups.late] min_slow_fraction"
    assert "never opens a window on its own" in str(error)


def test_plateau_alone_does_not_count_as_a_transparent_measure():
    text = "[eligibility.groups.g]\nplateau = true\nmax_slow_fraction = 0.4\n"
    with pytest.raises(ConfigError, match="never opens a window on its own"):
        parse(text)


@pytest.mark.parametrize("line, replacement, key, words", [
    ("max_interval_error = 0.2", "max_interval_eror = 0.2", "max_interval_eror", "unknown key"),
    ("max_interval_error = 0.2", "max_interval_error = \"low\"", "max_interval_error", "expected a number"),
    ("max_sessions_since_plateau = 4", "max_sessions_since_plateau = 4.5", "max_sessions_since_plateau",
     "whole number"),
    ("max_slow_fraction = 0.5", "max_slow_fraction = 1.5", "max_slow_fraction", "between 0 and 1"),
    ("slow_fraction_basis = \"estimate\"", "slow_fraction_basis = \"median\"", "slow_fraction_basis",
     "expected one of"),
    ("slow_fraction_status = [\"estimated\"]", "slow_fraction_status = []", "slow_fraction_status", "status word"),
    ("max_interval_error = 0.2", "max_interval_error = -0.1", "max_interval_error", ">= 0"),
])
def test_bad_values_name_their_line_and_key(line, replacement, key, words):
    text = BASE.replace(line, replacement)
    with pytest.raises(ConfigError) as caught:
        parse(text)
    assert caught.value.line == line_of(text, replacement.split(" =")[0])
    assert caught.value.key.endswith(key)
    assert words in str(caught.value)


def test_empty_window_and_useless_keys_are_refused():
    with pytest.raises(ConfigError, match="window is empty"):
        parse("[eligibility.groups.g]\nmin_cv = 0.3\nmax_cv = 0.2\n")
    with pytest.raises(ConfigError, match="has no effect"):
        parse("[eligibility.groups.g]\nmax_cv = 0.2\nslow_fraction_basis = \"estimate\"\n")
    with pytest.raises(ConfigError, match="need `plateau = true`"):
        parse("[eligibility.groups.g]\nplateau = false\nmin_trials_since_plateau = 10\n")
    with pytest.raises(ConfigError, match="at least one group"):
        parse("[eligibility]\ncohort = \"x\"\n")
    with pytest.raises(ConfigError, match="bare words"):
        parse('[eligibility.groups."two words"]\nmax_cv = 0.2\n')


def test_without_a_toml_file_the_key_is_still_named():
    with pytest.raises(ConfigError) as caught:
        parse_eligibility({"groups": {"g": {"max_slow_fraction": 0.3}}}, None)
    assert caught.value.key == "[eligibility.groups.g] max_slow_fraction"
    assert caught.value.line is None


def test_rule_reads_the_raw_table_kept_by_parse_protocol():
    text = ('[protocol]\nname = "two-press 650 ms"\nversion = 3\ntask = "two_press"\n'
            'target_ms = 650\ntolerance = 0.2\n\n' + BASE)
    protocol = parse_protocol(text, "p.toml")
    doc = TomlFile(text, "p.toml")
    rule = parse_eligibility(protocol.eligibility, doc, protocol_name=protocol.name,
                             protocol_version=protocol.version)
    assert rule.protocol_version == 3 and len(rule.groups) == 2
    broken = text.replace("min_sessions_since_plateau = 8\n", "")
    with pytest.raises(ConfigError) as caught:
        parse_eligibility(parse_protocol(broken, "p.toml").eligibility, TomlFile(broken, "p.toml"))
    assert caught.value.line == line_of(broken, "min_slow_fraction")


def test_the_example_in_the_docs_parses():
    blocks = re.findall(r"```toml\n(.*?)```", DOCS.read_text(encoding="utf-8"), re.S)
    example = next(b for b in blocks if "[eligibility.groups." in b)
    rule = parse(example)
    assert len(rule.groups) >= 2
    assert all(g.bounds for g in rule.groups if g.slow is not None)
