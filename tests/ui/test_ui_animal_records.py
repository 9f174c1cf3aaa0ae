"""The animals window: records shown (model -> UI), edits and new animals asked for (UI -> model), and the
check-in dialog's path to add a name it does not know."""

from __future__ import annotations

from monitor.ui.animal_records import AnimalEdit, AnimalRecordsWindow, record_state
from monitor.ui.dialogs import CheckInDialog
from monitor.ui.models import Roster

RECORDS = [
    {"name": "alder", "lab_id": "R001", "cohort": "orchard", "species": "Rattus norvegicus", "sex": "F",
     "date_of_birth": "2025-10-01", "age_days": None, "age_date": None, "strain": "Long-Evans",
     "genotype": "wild type", "supplier": None, "baseline_weight_g": 335.0, "baseline_weight_date": None,
     "notes": None, "retired_at": None, "sessions": 12, "missing": []},
    {"name": "birch", "lab_id": None, "cohort": None, "species": None, "sex": None, "date_of_birth": None,
     "age_days": None, "age_date": None, "strain": None, "genotype": None, "supplier": None,
     "baseline_weight_g": None, "baseline_weight_date": None, "notes": None, "retired_at": None, "sessions": 3,
     "missing": ["species", "sex", "date_of_birth or age", "strain", "genotype"]},
]


def test_records_shown_and_an_edit_sends_only_what_changed(qtbot, tmp_path):
    window = AnimalRecordsWindow("Rivera, Ana")
    qtbot.addWidget(window)
    window.set_records(RECORDS, select="alder")
    assert window.table.rowCount() == 2
    assert window.table.item(1, 8).text() == "▲ lacks species, sex, date_of_birth or age, " \
                                             "strain, genotype"
    assert window.name.text() == "alder" and window.name.isReadOnly()
    window.inputs["genotype"].setText("Th-Cre")
    window.inputs["baseline_weight_g"].setText("340")
    window.inputs["supplier"].setText("")
    with qtbot.waitSignal(window.save_requested) as sent:
        window.save_button.click()
    assert sent.args[0] == AnimalEdit("alder", False, "Rivera, Ana", {"genotype": "Th-Cre", "baseline_weight_g": 340.0})
    window.set_history(["2026-03-02T09:00:00+01:00  Rivera, Ana  genotype: wild type → Th-Cre"])
    window.show_error("sex: expected one of F, M, U, O, got 'X'")
    window.resize(1200, 640)
    window.grab().save(str(tmp_path / "animals.png"))


def test_a_new_animal_and_refusals_in_place(qtbot):
    window = AnimalRecordsWindow("")
    qtbot.addWidget(window)
    window.set_records(RECORDS)
    window.start_new("cedar")
    window.inputs["species"].setCurrentText("Mus musculus")
    window.inputs["sex"].setCurrentIndex(window.inputs["sex"].findData("M"))
    window.inputs["age_days"].setText("sixty")
    window.save_button.click()
    assert not window.error.isHidden() and "Changed by" in window.error.text()  # who is needed first
    window.operator.setText("Kim, Bo")
    window.save_button.click()
    assert "Age today (days): expected a number" in window.error.text()
    window.inputs["age_days"].setText("60")
    with qtbot.waitSignal(window.save_requested) as sent:
        window.save_button.click()
    assert sent.args[0] == AnimalEdit("cedar", True, "Kim, Bo", {"species": "Mus musculus", "sex": "M",
                                                                  "age_days": 60})
    assert record_state({"retired_at": "2026-04-01T10:00:00+02:00"}) == "retired 2026-04-01"


def test_check_in_offers_to_add_an_unknown_name(qtbot):
    dialog = CheckInDialog(Roster(animals=("alder",), rigs=("box1",), stages=("final",)))
    qtbot.addWidget(dialog)
    dialog.animal.setCurrentText("alder")
    assert dialog.new_animal_button.isHidden()
    dialog.animal.setCurrentText("cedar")
    assert not dialog.new_animal_button.isHidden()
    with qtbot.waitSignal(dialog.new_animal) as sent:
        dialog.new_animal_button.click()
    assert sent.args == ["cedar"] and dialog.result() == dialog.DialogCode.Rejected  # closed: nothing checked in
