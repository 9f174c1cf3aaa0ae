"""Outputs other than the pty, the live CLI, scheduled faults, and the demo API."""

import io
import json
import os

import pytest

from drivers.wire import Event, Header, Malformed, decode_all
from mock_rig.__main__ import main
from mock_rig.demo import prepare_demo, start_demo
from mock_rig.faults import Fault, parse_fault
from mock_rig.history import cohort
from mock_rig.live import LiveRig, stop_rigs
from mock_rig.outputs import FileOutput, StreamOutput, wait_until


def test_file_output_appends_what_was_sent(tmp_path):
    path = tmp_path / "box.log"
    path.write_bytes(b"# earlier run\n")
    output = FileOutput(path, per_line=True, record=True)
    rig = LiveRig(cohort(1, 2)[0], output, speed=300).start()
    assert wait_until(lambda: len(output.sent[0]) > 200, 20)
    rig.stop()
    data = path.read_bytes()
    assert data == b"# earlier run\n" + b"".join(output.sent[0])
    records = decode_all(data)
    assert not [r for r in records if isinstance(r, Malformed)]
    assert isinstance(records[1], Header)


@pytest.mark.slow
def test_stream_output_and_scheduled_silence_leave_a_device_time_gap():
    stream = io.BytesIO()
    output = StreamOutput(stream, record=True)
    rig = LiveRig(cohort(1, 3)[0], output, speed=200, faults=(Fault("silent", 0.3, 0.4),)).start()
    assert wait_until(lambda: rig.faults_applied and len(output.sent[0]) > 300, 20)
    rig.stop()
    events = [r for r in decode_all(stream.getvalue()) if isinstance(r, Event)]
    gaps = [b.t_us - a.t_us for a, b in zip(events, events[1:])]
    assert max(gaps) >= 0.4 * 200 * 1e6 * 0.9  # the box was silent for 0.4 s at 200x
    assert sum(isinstance(r, Header) for r in decode_all(stream.getvalue())) == 1  # no reset


@pytest.mark.slow
def test_stuck_lever_and_open_valve_in_a_live_box():
    stream = io.BytesIO()
    output = StreamOutput(stream)
    rig = LiveRig(cohort(1, 4)[0], output, speed=300).start()
    assert wait_until(lambda: output.lines_written > 50, 20)
    rig.inject("stuck_lever", 0.6)  # 180 s of box time at 300x: ~14 trials of 12.5 s
    rig.inject("valve_open", 0.3)
    assert wait_until(lambda: len(rig.faults_applied) == 2, 10)
    written = output.lines_written
    assert wait_until(lambda: output.lines_written > written + 1500, 20)
    rig.stop()
    events = [r for r in decode_all(stream.getvalue()) if isinstance(r, Event)]
    names = [e.name for e in events]
    # a held lever: one lever_down, then only omitted trials until it is released
    held = max(range(len(names)), key=lambda i: _run_without(names, i, "lever_up"))
    assert _run_without(names, held, "lever_up") > 8
    licks = [e.t_us for e in events if e.name == "lick"]
    assert max(b - a for a, b in zip(licks, licks[1:])) > 0 and len(licks) > 100


def _run_without(names, start, word):
    """How many trial_starts follow `start` before `word` appears."""
    if names[start] != "lever_down":
        return 0
    count = 0
    for name in names[start + 1 :]:
        if name == word:
            break
        count += name == "trial_start"
    return count


def test_fault_spec_parsing():
    assert parse_fault("unplug@30:5") == Fault("unplug", 30.0, 5.0)
    assert parse_fault("reset@2").duration == 0.0
    with pytest.raises(ValueError, match="unknown fault"):
        parse_fault("flood@1")
    with pytest.raises(ValueError, match="KIND@START"):
        parse_fault("unplug")


@pytest.mark.slow
def test_live_cli_to_file_with_wrap_soon_and_garbage(tmp_path, capsys):
    path = tmp_path / "live.rsw"
    code = main(["live", "--out", f"file:{path}", "--speed", "300", "--seconds", "1.5",
                 "--wrap-soon", "60", "--fault", "garbage@0.2:2", "--sessions", "0"])
    assert code == 0
    records = decode_all(path.read_bytes())
    assert sum(isinstance(r, Malformed) for r in records) == 2
    raw = [r.raw_time for r in records if isinstance(r, Event)]
    assert raw[0] > 2**32 - 61_000_000 and min(raw) < raw[0]  # wrapped within the run
    times = [r.t_us for r in records if isinstance(r, Event)]
    assert times == sorted(times)


def test_live_cli_rejects_bad_output(capsys):
    with pytest.raises(SystemExit) as stop:
        main(["live", "--out", "serial:/dev/x"])
    assert stop.value.code == 2 and "--out" in capsys.readouterr().err


def test_demo_api_starts_and_stops_rigs_on_ptys(tmp_path):
    stages = (("naive", "alder", 1), ("learning", "birch", 2))
    prepared = prepare_demo(tmp_path / "hist", stages=stages)
    truth = json.loads((tmp_path / "hist" / "truth.json").read_text())
    assert [truth["animals"][n]["label"] for n in ("alder", "birch")] == ["naive", "learning"]
    assert [len(d.session_files) for d in prepared] == [1, 2]
    rigs = start_demo(prepared, tmp_path / "links", speed=50)
    try:
        for rig, d in zip(rigs, prepared):
            link = tmp_path / "links" / d.animal.name
            assert os.path.realpath(link) == rig.output.device
    finally:
        stop_rigs(rigs)
    assert not any(r.running for r in rigs)
    assert not (tmp_path / "links" / "alder").exists()


@pytest.mark.slow
def test_demo_history_labels_are_true(tmp_path):
    prepared = prepare_demo(tmp_path)
    by_label = {d.label: d.animal.sessions for d in prepared}

    def final_rates(sessions):
        return [s["hits"] / s["trials"] for s in sessions if s["stage"] == "final"]

    def plateaued(sessions):  # the protocol's rule: 3 consecutive final-stage sessions >= 0.5
        rates = final_rates(sessions)
        return any(all(r >= 0.5 for r in rates[i : i + 3]) for i in range(len(rates) - 2))

    cons = {label: s[-1]["consolidation"] for label, s in by_label.items()}
    assert not plateaued(by_label["learning"])
    assert plateaued(by_label["plateaued, not consolidated"]) and plateaued(by_label["consolidated"])
    assert cons["naive"] < cons["learning"] < cons["plateaued, not consolidated"] < 0.8
    assert cons["consolidated"] > 0.9
