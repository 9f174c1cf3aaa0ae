"""Check-in / check-out and setup dialogs: model→UI and UI→model."""

from __future__ import annotations

from PySide6.QtCore import Qt

from monitor.ui.dialogs import CheckInDialog
from monitor.ui.models import CheckIn, CheckOut, RigSetup, Roster, SerialDevice
from monitor.ui.setup import SetupDialog, device_text

ROSTER = Roster(animals=("alder", "birch", "cedar"), rigs=("box-01", "box-02", "box-03"),
                stages=("shaping", "final"), usual_rigs={"alder": ("box-01",), "cedar": ("box-03",)},
                occupied={"box-03": "cedar"}, operators=("R. Okafor",))
DEVICES = [SerialDevice("/dev/ttyACM0", "Arduino Uno", "7573530323"), SerialDevice("/dev/ttyUSB1", "<i>FTDI</i>",
                                                                                   None)]


def test_check_in_warns_about_an_unusual_box(qtbot):
    dialog = CheckInDialog(ROSTER, rig="box-01")
    qtbot.addWidget(dialog)
    dialog.animal.setCurrentText("alder")
    assert dialog.warning.isHidden()
    dialog.rig.setCurrentText("box-02")
    assert not dialog.warning.isHidden()
    assert dialog.warning.text() == "▲ alder is usually in box-01, not box-02. Check the box before starting."
    assert dialog.warning.textFormat() == Qt.TextFormat.PlainText


def test_check_in_refuses_until_fixed_then_emits(qtbot):
    dialog = CheckInDialog(ROSTER, rig="box-01")
    qtbot.addWidget(dialog)
    dialog.animal.setCurrentText("alder")
    dialog.operator.setCurrentText("")
    with qtbot.assertNotEmitted(dialog.checked_in):
        assert not dialog.try_accept()
    assert "Operator: type your name." in dialog.problem_line.text()
    assert "Weight:" in dialog.problem_line.text()
    dialog.operator.setCurrentText("R. Okafor")
    dialog.weight.setValue(27.4)
    dialog.stage.setCurrentText("final")
    with qtbot.waitSignal(dialog.checked_in) as done:
        assert dialog.try_accept()
    assert done.args == [CheckIn(animal="alder", rig="box-01", operator="R. Okafor", weight_g=27.4, stage="final")]


def test_check_out_is_offered_only_for_an_occupied_box(qtbot):
    dialog = CheckInDialog(ROSTER, rig="box-03")
    qtbot.addWidget(dialog)
    assert dialog.animal.currentText() == "cedar"               # the occupant is preselected
    assert dialog.occupant.text() == "cedar is checked in here."
    assert dialog.check_out_button.isEnabled()
    with qtbot.assertNotEmitted(dialog.checked_out):
        qtbot.mouseClick(dialog.check_out_button, Qt.MouseButton.LeftButton)     # no operator yet
    assert "Operator" in dialog.problem_line.text()
    dialog.operator.setCurrentText("R. Okafor")
    with qtbot.assertNotEmitted(dialog.checked_out):
        qtbot.mouseClick(dialog.check_out_button, Qt.MouseButton.LeftButton)     # asks to confirm first
    assert dialog.check_out_button.text() == "Confirm: check cedar out of box-03 now"
    with qtbot.waitSignal(dialog.checked_out) as out:
        qtbot.mouseClick(dialog.check_out_button, Qt.MouseButton.LeftButton)
    assert out.args == [CheckOut("box-03", "cedar", "R. Okafor")]
    dialog = CheckInDialog(ROSTER, rig="box-03", operator="R. Okafor")
    qtbot.addWidget(dialog)
    dialog.rig.setCurrentText("box-02")
    assert not dialog.check_out_button.isEnabled() and dialog.occupant.text() == "This box is free."


def test_setup_lists_discovered_devices_as_plain_text(qtbot):
    dialog = SetupDialog(DEVICES, protocols=["/lab/p.toml"], exists=lambda p: True)
    qtbot.addWidget(dialog)
    assert dialog.device.itemText(0) == "Arduino Uno · serial no. 7573530323 · /dev/ttyACM0"
    assert dialog.device.itemText(1) == device_text(DEVICES[1]) == "<i>FTDI</i> · no serial number · /dev/ttyUSB1"
    assert dialog.use_serial.isChecked()


def test_setup_refuses_bad_settings_with_what_to_fix_then_emits(qtbot):
    dialog = SetupDialog(DEVICES, protocols=["/lab/p.toml"], existing=["box-01"], exists=lambda p: p == "/lab/p.toml")
    qtbot.addWidget(dialog)
    dialog.name.setText("box-01")
    dialog.valve.setValue(55.0)
    with qtbot.assertNotEmitted(dialog.rig_added):
        assert not dialog.try_accept()
    text = dialog.problem_line.text()
    assert "already exists" in text and "Valve calibration:" in text
    dialog.name.setText("box-05")
    dialog.valve.setValue(0.085)
    with qtbot.waitSignal(dialog.rig_added) as added:
        assert dialog.try_accept()
    assert added.args == [RigSetup(name="box-05", source="serial", path="/dev/ttyACM0", serial_number="7573530323",
                                   mapping_path=None, valve_ul_per_ms=0.085, protocol_path="/lab/p.toml")]


def test_setup_with_a_log_file_and_no_devices(qtbot):
    dialog = SetupDialog([], protocols=["/lab/p.toml"], exists=lambda p: p != "/lab/missing.toml")
    qtbot.addWidget(dialog)
    assert dialog.use_file.isChecked() and not dialog.device.isEnabled()
    dialog.name.setText("box-07")
    dialog.file_path.setText("/lab/box07.log")
    dialog.mapping.setText("/lab/missing.toml")
    assert not dialog.try_accept() and dialog.problem_line.text().startswith("✖ Mapping:")
    dialog.mapping.setText("/lab/map.toml")
    with qtbot.waitSignal(dialog.rig_added) as added:
        dialog.try_accept()
    setup = added.args[0]
    assert (setup.source, setup.path, setup.mapping_path, setup.valve_ul_per_ms) == (
        "file", "/lab/box07.log", "/lab/map.toml", None)


def test_setup_says_whether_the_board_restarts_when_the_port_opens(qtbot):
    dialog = SetupDialog(DEVICES, protocols=["/lab/p.toml"], exists=lambda p: True)
    qtbot.addWidget(dialog)
    dialog.name.setText("box-06")
    assert dialog.reset.isChecked() and dialog.setup().reset
    dialog.reset.setChecked(False)
    assert dialog.setup().reset is False
    dialog.use_file.setChecked(True)
    assert not dialog.reset.isEnabled() and dialog.setup().reset  # a file has no board to restart
def test_check_in_stage_defaults_to_the_box_then_the_animal_then_the_first_stage(qtbot):
    from dataclasses import replace

    roster = replace(ROSTER, stages=("shaping", "adaptive", "final"), current_stage={"alder": "final"},
                     first_stage={"box-01": "shaping", "box-02": "shaping"}, box_stage={"box-02": "adaptive"})
    dialog = CheckInDialog(roster, rig="box-01")
    qtbot.addWidget(dialog)
    dialog.animal.setCurrentText("birch")                 # a new animal: the protocol's first stage
    assert dialog.stage.currentText() == "shaping"
    dialog.animal.setCurrentText("alder")                 # an animal in training: its current stage
    assert dialog.stage.currentText() == "final"
    dialog.rig.setCurrentText("box-02")                   # a box that said its stage: the box's word
    assert dialog.stage.currentText() == "adaptive"


def test_give_dialog_offers_only_boxes_that_ran_unattended_and_needs_a_reason(qtbot):
    from monitor.ui.dialogs import GiveDialog
    from monitor.ui.models import UnattendedGift

    dialog = GiveDialog(ROSTER, {"box-02": 14}, rig="box-01", operator="R. Okafor")
    qtbot.addWidget(dialog)
    assert [dialog.rig.itemText(i) for i in range(dialog.rig.count())] == ["box-02"]
    assert dialog.count.text() == "14 presses or trials kept from this box."
    dialog.animal.setCurrentText("birch")
    with qtbot.assertNotEmitted(dialog.given):
        assert not dialog.try_accept()
    assert "Reason" in dialog.problem_line.text()
    dialog.reason.setText("checked in late")
    with qtbot.waitSignal(dialog.given) as done:
        assert dialog.try_accept()
    assert done.args == [UnattendedGift("box-02", "birch", "R. Okafor", "checked in late")]
