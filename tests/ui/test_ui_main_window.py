"""The main window: composition of the panels, shortcuts, layout saved, status bar, sizing."""

from __future__ import annotations

import numpy as np
import pyqtgraph as pg
import pytest
from PySide6.QtCore import QRect, QSettings, Qt
from PySide6.QtGui import QColor, QKeySequence, QPalette
from PySide6.QtWidgets import QApplication, QLabel

from monitor.ui import sample
from monitor.ui.animal_page import AnimalPage
from monitor.ui.dialogs import CheckInDialog
from monitor.ui.main_window import SHORTCUTS, MainWindow
from monitor.ui.models import CheckIn, Roster, SerialDevice, StatusState, StoreHealth
from monitor.ui.owners import AlertBook, AnimalBook, RigBoard
from monitor.ui.setup import SetupDialog
from monitor.ui.theme import ADVISORY

ROSTER = Roster(animals=sample.ANIMALS, rigs=tuple(f"box-{i:02d}" for i in range(1, 17)), stages=sample.STAGES,
                occupied={"box-03": "cedar"}, usual_rigs={"cedar": ("box-03",)})


def make_window(qtbot, settings: QSettings | None = None, rigs: int = 16) -> MainWindow:
    board, book, alerts = RigBoard(), AnimalBook(), AlertBook()
    rng = np.random.default_rng(1)
    for i in range(rigs):
        board.update(sample.tile_state(i, rng))
    book.update(sample.animal_page_state("cedar"))
    for a in sample.alerts():
        alerts.add(a)
    window = MainWindow(board, book, alerts, settings=settings, roster=ROSTER, beep=lambda: None,
                        discover_devices=lambda: [SerialDevice("/dev/ttyACM9", "board", "99")],
                        protocols=lambda: ["/lab/p.toml"])
    qtbot.addWidget(window)
    return window


def show_active(qtbot, window: MainWindow) -> None:
    """Show the window and make it the active one, so that its shortcuts fire."""
    window.show()
    qtbot.waitExposed(window)
    window.activateWindow()
    qtbot.waitUntil(lambda: QApplication.activeWindow() is window)


def clipped_labels(window) -> list[str]:
    """Visible labels that do not get the room their text needs, or lie outside the window."""
    bad = []
    frame = QRect(0, 0, window.width(), window.height())
    for label in window.findChildren(QLabel):
        if not label.isVisibleTo(window) or not label.text():
            continue
        top_left = label.mapTo(window, label.rect().topLeft())
        if not frame.contains(QRect(top_left, label.size())):
            bad.append(f"outside: {label.text()[:40]}")
        elif label.wordWrap():
            if label.height() < label.heightForWidth(label.width()) - 1:
                bad.append(f"too short: {label.text()[:40]}")
        elif label.width() < label.sizeHint().width() - 1 or label.height() < label.sizeHint().height() - 1:
            bad.append(f"too narrow: {label.text()[:40]}")
    return bad


# --- model -> UI ---------------------------------------------------------------
@pytest.mark.slow
def test_window_is_1366_by_768_and_nothing_is_clipped(qtbot):
    window = make_window(qtbot)
    window.resize(1366, 768)      # the offscreen screen is 800 x 800: size it as the smallest laptop screen
    window.show()
    qtbot.waitExposed(window)
    assert (window.width(), window.height()) == (1366, 768)
    assert clipped_labels(window) == []
    assert all(t.width() >= 220 and t.height() >= 140 for t in window.overview.tiles())
    page = window.open_animal("cedar")
    for index in range(page.sections.count()):
        page.sections.setCurrentIndex(index)
        QApplication.processEvents()
        assert clipped_labels(window) == [], page.sections.tabText(index)
        for plot in page.findChildren(pg.PlotWidget):
            if plot.isVisibleTo(window):
                assert plot.height() >= plot.minimumHeight()


def test_status_bar_is_loud_on_store_overflow(qtbot):
    window = make_window(qtbot)
    window.set_status(StatusState("16 sources: 15 live, 1 lost", StoreHealth.SAVING, "last commit 40 ms ago"))
    assert window.store_label.text() == "● store: saving — last commit 40 ms ago"
    assert window.store_label.styleSheet() == ""
    window.set_status(StatusState("16 sources", StoreHealth.OVERFLOW, "events kept in memory only"))
    assert window.store_label.text() == "✖ store: OVERFLOW — events kept in memory only"
    assert "background" in window.store_label.styleSheet()
    assert window.sources_label.text() == "16 sources"


def test_device_and_file_text_is_never_rich_text(qtbot):
    window = make_window(qtbot)
    window.set_status(StatusState("<b>/dev/ttyACM0</b>", StoreHealth.FAILED, "<i>disk full</i>"))
    window.open_animal("cedar")
    for label in window.findChildren(QLabel):
        assert label.textFormat() == Qt.TextFormat.PlainText, label.text()


def test_advisory_caution_is_shown_beside_care_and_consolidation_figures(qtbot):
    window = make_window(qtbot)
    page = window.open_animal("cedar")
    assert page.care_advisory.text() == ADVISORY and page.consolidation.advisory.text() == ADVISORY


@pytest.mark.slow
def test_plots_follow_a_dark_palette(qtbot):
    window = make_window(qtbot)
    page = window.open_animal("cedar")
    app = QApplication.instance()
    old = app.palette()
    dark = QPalette(old)
    dark.setColor(QPalette.ColorRole.Base, QColor("#1e1e1e"))
    dark.setColor(QPalette.ColorRole.Window, QColor("#2b2b2b"))
    dark.setColor(QPalette.ColorRole.Text, QColor("#eeeeee"))
    try:
        app.setPalette(dark)
        qtbot.waitUntil(lambda: page.histogram.plot.backgroundBrush().color().name() == "#1e1e1e")
    finally:
        app.setPalette(old)


# --- UI -> model ---------------------------------------------------------------
def test_opening_a_rig_opens_its_animal_page_once(qtbot):
    window = make_window(qtbot)
    with qtbot.waitSignal(window.page_opened) as opened:
        window.overview.open_requested.emit("box-03")
    assert opened.args == ["cedar"]
    assert isinstance(window.tabs.currentWidget(), AnimalPage) and window.tabs.tabText(1) == "cedar"
    with qtbot.assertNotEmitted(window.page_opened):
        window.open_rig("box-03")
    assert window.tabs.count() == 2
    assert window.open_rig("box-12") is None                     # idle box: nobody to show
    with qtbot.waitSignal(window.page_closed) as closed:
        window.close_current_page()
    assert closed.args == ["cedar"] and window.tabs.count() == 1


@pytest.mark.parametrize("key", sorted(SHORTCUTS))
def test_every_action_has_its_shortcut(qtbot, key):
    window = make_window(qtbot)
    assert window.actions[key].shortcut() == QKeySequence(SHORTCUTS[key])
    assert window.actions[key].shortcut().toString()


def test_check_in_shortcut_opens_the_dialog_for_the_current_rig_and_forwards_the_record(qtbot):
    window = make_window(qtbot)
    show_active(qtbot, window)
    window.overview.focus_rig("box-05")
    qtbot.keyClick(window.overview.tile("box-05"), Qt.Key.Key_I, Qt.KeyboardModifier.ControlModifier)
    dialog = window.dialog
    assert isinstance(dialog, CheckInDialog) and dialog.rig.currentText() == "box-05"
    dialog.animal.setCurrentText("egret")
    dialog.operator.setCurrentText("R. Okafor")
    dialog.weight.setValue(31.0)
    with qtbot.waitSignal(window.checked_in) as done:
        dialog.try_accept()
    assert done.args == [CheckIn("egret", "box-05", "R. Okafor", 31.0, sample.STAGES[0])]


def test_check_out_from_the_animal_page_uses_its_box(qtbot):
    window = make_window(qtbot)
    window.open_animal("cedar")
    dialog = window.open_check_out()
    assert dialog.rig.currentText() == "box-03"
    dialog.operator.setCurrentText("R. Okafor")
    qtbot.mouseClick(dialog.check_out_button, Qt.MouseButton.LeftButton)        # then confirm
    with qtbot.waitSignal(window.checked_out) as out:
        qtbot.mouseClick(dialog.check_out_button, Qt.MouseButton.LeftButton)
    assert out.args[0].rig == "box-03" and out.args[0].operator == "R. Okafor"


def test_next_rig_and_acknowledge_shortcuts(qtbot):
    window = make_window(qtbot)
    show_active(qtbot, window)
    window.overview.focus_rig("box-01")
    qtbot.keyClick(window.overview.tile("box-01"), Qt.Key.Key_F8)
    assert window.overview.current_rig() == "box-02"
    window.alert_panel.operator.setText("J. Lind")
    with qtbot.waitSignal(window.alerts.acknowledged) as done:
        qtbot.keyClick(window.overview.tile("box-02"), Qt.Key.Key_K, Qt.KeyboardModifier.ControlModifier)
    assert done.args[1] == "J. Lind"


def test_add_rig_dialog_gets_discovered_devices_and_forwards_the_setup(qtbot):
    window = make_window(qtbot, rigs=2)
    dialog = window.open_setup()
    assert isinstance(dialog, SetupDialog) and dialog.device.itemText(0).endswith("/dev/ttyACM9")
    dialog.exists = lambda path: True
    dialog.name.setText("box-02")                                # taken
    assert not dialog.try_accept()
    dialog.name.setText("box-09")
    with qtbot.waitSignal(window.rig_added) as added:
        assert dialog.try_accept()
    assert added.args[0].serial_number == "99"


def test_exclusion_from_a_page_reaches_the_window_signal(qtbot):
    window = make_window(qtbot)
    page = window.open_animal("cedar")
    dialog = page.sessions.open_exclusion(session=5)
    dialog.reason.setText("water bottle leaked")
    with qtbot.waitSignal(window.exclusion_requested) as emitted:
        dialog.try_accept()
    assert emitted.args[0].session == 5


def test_layout_and_operator_are_restored_and_the_window_fits_the_screen(qtbot, tmp_path):
    settings = QSettings(str(tmp_path / "rigside.ini"), QSettings.Format.IniFormat)
    first = make_window(qtbot, settings, rigs=2)
    first.show()
    qtbot.waitExposed(first)
    first.resize(760, 560)       # within the offscreen screen (800 x 800): restoreGeometry keeps it on screen
    first.splitter.setSizes([450, 300])
    first.alert_panel.operator.setText("R. Okafor")
    sizes = first.splitter.sizes()
    first.close()
    second = make_window(qtbot, QSettings(str(tmp_path / "rigside.ini"), QSettings.Format.IniFormat), rigs=2)
    second.show()
    qtbot.waitExposed(second)
    screen = second.screen().availableGeometry()
    assert (second.width(), second.height()) == (screen.width(), screen.height())
    assert (second.width(), second.height()) != (760, 560)      # fitted to the screen, not the last size
    assert abs(second.splitter.sizes()[1] - sizes[1]) <= 0.1 * sizes[1]     # the alert list keeps its width
    assert second.alert_panel.operator.text() == "R. Okafor"


def test_clip_checker_catches_a_clipped_label(qtbot):
    window = make_window(qtbot, rigs=2)
    window.show()
    qtbot.waitExposed(window)
    squeezed = QLabel("a long line of text that cannot fit")
    squeezed.setTextFormat(Qt.TextFormat.PlainText)
    squeezed.setFixedWidth(20)
    window.statusBar().addWidget(squeezed)
    QApplication.processEvents()
    assert clipped_labels(window) == ["too narrow: a long line of text that cannot fit"]


def test_the_windows_icons_are_our_svgs_and_render(qtbot):
    from icons import icon_path
    from PySide6.QtGui import QIcon

    window = make_window(qtbot, rigs=1)
    for name in ("rigside", "check-in", "check-out", "acknowledge", "add-rig"):
        assert not QIcon(str(icon_path(name))).pixmap(32, 32).isNull(), name
    assert all(not window.actions[key].icon().isNull() for key in ("check_in", "check_out", "acknowledge", "add_rig"))


def test_alert_list_and_status_bar_grow_with_a_wide_window(qtbot):
    window = make_window(qtbot, rigs=2)
    window.resize(1366, 768)
    window.show()
    qtbot.waitExposed(window)
    small = window.alert_panel.list.font().pointSizeF()
    window.resize(1920, 1080)
    QApplication.processEvents()
    assert window.alert_panel.list.font().pointSizeF() == pytest.approx(small * 1920 / 1366, rel=0.01)
    assert window.sources_label.font().pointSizeF() > small * 0.99


def test_the_alert_summary_is_not_all_quiet_while_boxes_are_not_reading(qtbot):
    from monitor.ui.alerts import AlertPanel
    from monitor.ui.models import StatusState
    from monitor.ui.owners import AlertBook

    window = make_window(qtbot, rigs=2)
    window.set_status(StatusState(sources_text="4 of 16 sources reading; 12 retrying", sources_detail="box-05: x",
                                  sources_trouble=True))
    assert window.sources_label.text().startswith("▲ 4 of 16")
    assert window.alert_panel._sources == "4 of 16 sources reading; 12 retrying"
    panel = AlertPanel(AlertBook())
    qtbot.addWidget(panel)
    panel.set_sources("4 of 16 sources reading; 12 retrying")
    assert panel.summary.text() == "No open alerts, but 4 of 16 sources reading; 12 retrying (status bar)."
    panel.set_sources("")
    assert panel.summary.text() == "All quiet: no open alerts."
