"""The cohort table: one row per animal, sorted by the figure under a header, saved as a printable page."""

from __future__ import annotations

from datetime import date

from PySide6.QtGui import QImage

from monitor.ui.cohort import COLUMNS, CohortRow, CohortTable, CohortView


def row(animal, sessions, water):
    cells = (animal, "final", str(sessions), "not reached", "no fit yet", "training",
             "no record today" if water is None else f"{water:.2f}", "no weight")
    return CohortRow(cells, (animal, "final", sessions, None, None, "training", water, None))


VIEW = CohortView(date(2026, 3, 2), (row("alder", 9, 1.2), row("birch", 12, None), row("cedar", 100, 0.4)))


def test_a_header_sorts_by_the_figure_not_its_text(qtbot):
    table = CohortTable(VIEW)
    qtbot.addWidget(table)
    assert [r[0] for r in table.shown_rows()] == ["alder", "birch", "cedar"]
    table.table.sortItems(COLUMNS.index("sessions"))
    assert [r[2] for r in table.shown_rows()] == ["9", "12", "100"]          # as numbers: "100" > "12"
    table.table.sortItems(COLUMNS.index("water today (ml)"))
    assert [r[0] for r in table.shown_rows()] == ["cedar", "alder", "birch"]  # no record today sorts last
    assert table.title.text() == "Every animal on 2026-03-02: 3 animals"


def test_the_printable_sheet_is_an_a4_landscape_page(qtbot, tmp_path):
    table = CohortTable(VIEW)
    qtbot.addWidget(table)
    path = table.save_sheet(str(tmp_path / "cohort.png"))
    image = QImage(path)
    # A4 landscape at 150 dpi: 297 x 210 mm = 1754 x 1240 px (ISO 216)
    assert (image.width(), image.height()) == (1754, 1240)
