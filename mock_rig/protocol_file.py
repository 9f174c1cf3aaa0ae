"""Writes a simulated protocol as the training-protocol TOML of docs/protocol.md.

Rule: the `[protocol]` and `[plateau]` tables carry the contract's keys,
describing the final stage (plateau is judged there), plus `reward_ul` (and
`threshold_deg` for the joystick task). `[session]` holds the session limits
and one `[[stages]]` table per shaping stage, in order, holds its name (the
word the box sends in `param stage`), target, window, adaptive-window rule,
inter-trial interval and premature rule. Only keys that the project's protocol
reader (monitor/core/protocol.py) knows are written; the simulator's own
stage-advance rule is not part of the file (docs/mock_rig.md).
"""

from __future__ import annotations

from mock_rig.tasks import JOYSTICK_HOLD, ScenarioProtocol, Stage


def protocol_toml(protocol: ScenarioProtocol) -> str:
    """The TOML text of `protocol`."""
    final = protocol.final
    lines = [
        "[protocol]",
        f"name = {_str(protocol.name)}",
        f"version = {protocol.version}",
        f"task = {_str(protocol.task)}",
        f"target_ms = {_num(final.target_ms)}",
        _window_line(final),
        f"trial_timeout_ms = {_num(protocol.trial_timeout_ms)}",
        f"reward_ul = {_num(protocol.reward_ul)}",
    ]
    if protocol.task == JOYSTICK_HOLD:
        lines.append(f"threshold_deg = {_num(protocol.joystick_threshold_deg)}")
    lines += [
        "",
        "[plateau]",
        'rule = "consecutive_sessions"',
        f"min_hit_rate = {_num(protocol.plateau_min_hit_rate)}",
        f"sessions = {protocol.plateau_sessions}",
        "",
        "[session]",
        f"max_minutes = {_num(protocol.max_minutes)}",
        f"max_trials = {protocol.max_trials}",
        f"max_water_ul = {_num(protocol.max_water_ul)}",
    ]
    for stage in protocol.stages:
        lines += ["", *_stage_lines(stage)]
    return "\n".join(lines) + "\n"


def _window_line(stage: Stage) -> str:
    if stage.window_ms is not None:
        return f"window_ms = [{_num(stage.window_ms[0])}, {_num(stage.window_ms[1])}]"
    return f"tolerance = {_num(stage.tolerance)}"


def _stage_lines(stage: Stage) -> list[str]:
    lines = [
        "[[stages]]",
        f"name = {_str(stage.name)}",
        f"target_ms = {_num(stage.target_ms)}",
        _window_line(stage),
    ]
    if stage.adaptive_rate is not None:
        lines.append(
            f"adaptive = {{ every = {stage.adapt_every}, target_rate = {_num(stage.adaptive_rate)}, "
            f"step = {_num(stage.adapt_step)}, min_tolerance = {_num(stage.tolerance_min)}, "
            f"max_tolerance = {_num(stage.tolerance_max)} }}"
        )
    lines += [f"iti_ms = {_num(stage.iti_ms)}", f"premature_ms = {_num(stage.premature_ms)}"]
    return lines


def _str(text: str) -> str:
    return '"' + text.replace("\\", "\\\\").replace('"', '\\"') + '"'


def _num(value: float) -> str:
    return str(int(value)) if float(value).is_integer() else repr(float(value))
