"""The main window: the overview, animal pages, the alert list and the status bar.

Rule: the window owns no data; it shows the RigBoard, AnimalBook and AlertBook
it is given and turns a person's actions into signals carrying frozen records
(check-in, check-out, new rig, exclusion, condition) for the app to store.
Common actions have keyboard shortcuts; the window opens fitted to the current
screen, and its layout (splitter, operator) is saved to and restored from the
QSettings passed in (GUI thread only); plots follow the
system palette when it changes; a store overflow or failure turns the status
bar loud. Sized for 1366×768 and up.
"""

from __future__ import annotations

from typing import Callable, Sequence

import pyqtgraph as pg
from PySide6.QtCore import QByteArray, QEvent, QSettings, Qt, Signal
from PySide6.QtGui import QAction, QCloseEvent, QFont, QGuiApplication, QIcon, QKeySequence
from PySide6.QtWidgets import QMainWindow, QSplitter, QTabWidget, QToolBar, QWidget

from icons import icon_path
from monitor.ui.alerts import AlertNotifier, AlertPanel
from monitor.ui.animal_page import AnimalPage
from monitor.ui.dialogs import CheckInDialog, GiveDialog, plain_label
from monitor.ui.file_dialogs import ExportDialog, ImportDialog
from monitor.ui.models import Roster, SerialDevice, StatusState
from monitor.ui.overview import OverviewPanel
from monitor.ui.owners import AlertBook, AnimalBook, RigBoard
from monitor.ui.setup import SetupDialog
from monitor.ui.theme import colour, plain_tooltip, plot_colours

SHORTCUTS = {
    "check_in": "Ctrl+I",
    "check_out": "Ctrl+O",
    "acknowledge": "Ctrl+K",
    "next_rig": "F8",
    "previous_rig": "Shift+F8",
    "open_page": "Ctrl+Return",
    "overview": "Ctrl+1",
    "close_page": "Ctrl+W",
    "add_rig": "Ctrl+Shift+N",
    "decide": "Ctrl+D",
    "decisions": "Ctrl+Shift+D",
    "care": "Ctrl+J",
    "animal_records": "Ctrl+Shift+A",
    "manipulation": "Ctrl+M",
    "effects": "Ctrl+Shift+E",
    "give": "Ctrl+G",
    "cohort": "Ctrl+T",
    "import_files": "Ctrl+Shift+I",
    "export": "Ctrl+E",
}


def _icon(name: str) -> QIcon:
    return QIcon(str(icon_path(name)))


class MainWindow(QMainWindow):
    """The window a trainer keeps open on the rig PC all day."""

    checked_in = Signal(object)            # CheckIn
    checked_out = Signal(object)           # CheckOut (confirmed, with the operator)
    rig_added = Signal(object)             # RigSetup
    exclusion_requested = Signal(object)   # Exclusion
    condition_requested = Signal(object)   # ConditionRecord
    page_opened = Signal(str)              # animal: the app starts pushing its page state
    page_closed = Signal(str)              # animal
    decision_requested = Signal(str)       # animal ('' when no page is open): open the decision dialog
    history_requested = Signal(str)        # animal: show its logged decisions
    care_requested = Signal()              # open the care window (the day's water ledger)
    animals_requested = Signal(str)        # open the animals window ('' or a new animal's name)
    manipulation_requested = Signal(str)   # animal ('' when no page is open): record a manipulation
    effects_requested = Signal()           # open the cohort effects window
    cohort_requested = Signal()            # open the cohort table
    unattended_given = Signal(object)      # UnattendedGift
    import_chosen = Signal(object)         # ImportChoice: import these session files
    export_chosen = Signal(object)         # ExportChoice: export into this folder

    def __init__(self, board: RigBoard, book: AnimalBook, alerts: AlertBook, settings: QSettings | None = None,
                 roster: Roster | None = None, discover_devices: Callable[[], Sequence[SerialDevice]] = tuple,
                 protocols: Callable[[], Sequence[str]] = tuple, beep: Callable[[], None] | None = None,
                 parent: QWidget | None = None) -> None:
        super().__init__(parent)
        self.board, self.book, self.alerts = board, book, alerts
        self.settings = settings
        self.roster = roster or Roster()
        self.discover_devices, self.protocols = discover_devices, protocols
        self.setWindowTitle("rigside")
        self.setWindowIcon(_icon("rigside"))
        self.overview = OverviewPanel(board)
        self.overview.open_requested.connect(self.open_rig)
        self.tabs = QTabWidget()
        self.tabs.setTabsClosable(True)
        self.tabs.setDocumentMode(True)
        self.tabs.addTab(self.overview, "All rigs")
        self.tabs.tabBar().setTabButton(0, self.tabs.tabBar().ButtonPosition.RightSide, None)
        self.tabs.tabCloseRequested.connect(self._close_tab)
        self.alert_panel = AlertPanel(alerts)
        self.notifier = AlertNotifier(alerts, self.windowIcon(), **({"beep": beep} if beep else {}))
        self.splitter = QSplitter(Qt.Orientation.Horizontal)
        self.splitter.addWidget(self.tabs)
        self.splitter.addWidget(self.alert_panel)
        self.splitter.setStretchFactor(0, 1)
        self.splitter.setSizes([1000, 360])
        self.setCentralWidget(self.splitter)
        self.pages: dict[str, AnimalPage] = {}
        self.dialog: QWidget | None = None
        self.sources_label = plain_label(wrap=False)
        self.store_label = plain_label(wrap=False)
        self.store_label.setObjectName("store_state")
        self.statusBar().addWidget(self.sources_label, 1)
        self.statusBar().addPermanentWidget(self.store_label)
        self.actions: dict[str, QAction] = {}
        self._build_actions()
        self.set_status(StatusState())
        self._scaled = 1.0
        self._base_fonts = [(w, w.font().pointSizeF()) for w in (self.alert_panel.list, self.alert_panel.summary,
                                                                 self.sources_label, self.store_label)]
        self.fit_to_screen()
        self._restore()
        hints = QGuiApplication.styleHints()
        if hints is not None:
            hints.colorSchemeChanged.connect(self._on_scheme_changed)

    # --- actions ---------------------------------------------------------------
    def _action(self, key: str, text: str, slot: Callable[[], object], icon: str | None = None) -> QAction:
        action = QAction(_icon(icon) if icon else QIcon(), text, self)
        action.setShortcut(QKeySequence(SHORTCUTS[key]))
        action.setShortcutContext(Qt.ShortcutContext.WindowShortcut)
        action.triggered.connect(lambda checked=False: slot())
        self.addAction(action)
        self.actions[key] = action
        return action

    def _build_actions(self) -> None:
        files = self.menuBar().addMenu("&File")
        files.addAction(self._action("import_files", "&Import session files…", self.open_import))
        files.addAction(self._action("export", "&Export…", self.open_export))
        rigs = self.menuBar().addMenu("&Rigs")
        rigs.addAction(self._action("check_in", "Check &in…", self.open_check_in, "check-in"))
        rigs.addAction(self._action("check_out", "Check &out…", self.open_check_out, "check-out"))
        rigs.addSeparator()
        rigs.addAction(self._action("next_rig", "&Next rig", lambda: self.overview.focus_next(1)))
        rigs.addAction(self._action("previous_rig", "&Previous rig", lambda: self.overview.focus_next(-1)))
        rigs.addAction(self._action("open_page", "Open animal &page", self.open_current))
        rigs.addSeparator()
        rigs.addAction(self._action("give", "&Give unattended trials…", self.open_give))
        rigs.addSeparator()
        rigs.addAction(self._action("add_rig", "&Add rig…", self.open_setup, "add-rig"))
        view = self.menuBar().addMenu("&View")
        view.addAction(self._action("overview", "&All rigs", lambda: self.tabs.setCurrentIndex(0)))
        view.addAction(self._action("close_page", "&Close page", self.close_current_page))
        animals = self.menuBar().addMenu("A&nimals")
        animals.addAction(self._action("decide", "Record a &decision…",
                                       lambda: self.decision_requested.emit(self.current_animal())))
        animals.addAction(self._action("decisions", "Decision &history…",
                                       lambda: self.history_requested.emit(self.current_animal())))
        animals.addAction(self._action("care", "&Care today…", self.care_requested.emit))
        animals.addAction(self._action("animal_records", "Animal &records…", lambda: self.animals_requested.emit("")))
        animals.addAction(self._action("manipulation", "Record a &manipulation…",
                                       lambda: self.manipulation_requested.emit(self.current_animal())))
        animals.addAction(self._action("effects", "Cohort &effects…", self.effects_requested.emit))
        animals.addAction(self._action("cohort", "Cohort &table…", self.cohort_requested.emit))
        alerts = self.menuBar().addMenu("A&lerts")
        alerts.addAction(self._action("acknowledge", "&Acknowledge", self.alert_panel.acknowledge_selected,
                                      "acknowledge"))
        bar = QToolBar("Actions")
        bar.setObjectName("actions")
        bar.setMovable(False)
        bar.setToolButtonStyle(Qt.ToolButtonStyle.ToolButtonTextBesideIcon)
        for key in ("check_in", "check_out", "acknowledge", "add_rig"):
            bar.addAction(self.actions[key])
        self.addToolBar(bar)

    # --- data from the app -----------------------------------------------------
    def set_roster(self, roster: Roster) -> None:
        self.roster = roster

    def set_status(self, status: StatusState) -> None:
        self.sources_label.setText(("▲ " if status.sources_trouble else "") + status.sources_text)
        self.alert_panel.set_sources(status.sources_text if status.sources_trouble else "")
        self.sources_label.setToolTip(plain_tooltip(status.sources_detail) if status.sources_detail else "")
        self.sources_label.setStyleSheet(f"color: {colour('vermillion').darker(120).name()}; font-weight: bold;"
                                         if status.sources_trouble else "")
        store = status.store
        text = f"store: {store.word}" + (f" — {status.store_text}" if status.store_text else "")
        self.store_label.setText(("✖ " if store.loud else "● ") + text)
        if store.loud:
            self.store_label.setStyleSheet(f"background: {colour('vermillion').name()}; color: #000000; "
                                           "font-weight: bold; padding: 0px 8px;")
        else:
            self.store_label.setStyleSheet("")

    # --- pages -----------------------------------------------------------------
    def open_rig(self, rig: str) -> AnimalPage | None:
        """Open the page of the animal checked in at `rig`."""
        state = self.board.state(rig)
        if state is None or not state.animal:
            self.statusBar().showMessage(f"{rig} has no animal checked in.", 5000)
            return None
        return self.open_animal(state.animal)

    def open_current(self) -> AnimalPage | None:
        rig = self.overview.current_rig()
        return self.open_rig(rig) if rig else None

    def open_animal(self, animal: str) -> AnimalPage:
        page = self.pages.get(animal)
        if page is None:
            page = AnimalPage(self.book, animal)
            page.exclusion_requested.connect(self.exclusion_requested)
            page.condition_requested.connect(self.condition_requested)
            page.decision_requested.connect(self.decision_requested)
            page.history_requested.connect(self.history_requested)
            page.care_requested.connect(self.care_requested)
            page.manipulation_requested.connect(self.manipulation_requested)
            self.pages[animal] = page
            self.tabs.addTab(page, animal)
            self.page_opened.emit(animal)
        self.tabs.setCurrentWidget(page)
        return page

    def current_animal(self) -> str:
        """The animal of the page in front ('' on the overview)."""
        page = self.tabs.currentWidget()
        return page.animal if isinstance(page, AnimalPage) else ""

    def close_current_page(self) -> None:
        index = self.tabs.currentIndex()
        if index > 0:
            self._close_tab(index)

    def _close_tab(self, index: int) -> None:
        page = self.tabs.widget(index)
        if not isinstance(page, AnimalPage):
            return
        self.tabs.removeTab(index)
        page.disconnect_book()
        self.pages.pop(page.animal, None)
        self.page_closed.emit(page.animal)
        page.deleteLater()

    # --- dialogs ---------------------------------------------------------------
    def _current_rig(self) -> str | None:
        page = self.tabs.currentWidget()
        if isinstance(page, AnimalPage):
            state = self.book.state(page.animal)
            if state is not None and state.rig:
                return state.rig
        return self.overview.current_rig()

    def open_check_in(self) -> CheckInDialog:
        dialog = CheckInDialog(self.roster, rig=self._current_rig(), operator=self.alert_panel.operator.text(),
                               parent=self)
        dialog.checked_in.connect(self.checked_in)
        dialog.checked_out.connect(self.checked_out)
        dialog.new_animal.connect(self.animals_requested)
        return self._show(dialog)

    def open_check_out(self) -> CheckInDialog:
        dialog = self.open_check_in()
        dialog.check_out_button.setDefault(True)
        dialog.check_out_button.setFocus()
        return dialog

    def open_give(self) -> GiveDialog:
        presses = {r: s.unattended_presses for r in self.board.rigs() if (s := self.board.state(r)) is not None}
        dialog = GiveDialog(self.roster, presses, rig=self._current_rig(), operator=self.alert_panel.operator.text(),
                            parent=self)
        dialog.given.connect(self.unattended_given)
        return self._show(dialog)

    def open_setup(self) -> SetupDialog:
        dialog = SetupDialog(self.discover_devices(), self.protocols(), existing=self.board.rigs(), parent=self)
        dialog.rig_added.connect(self.rig_added)
        return self._show(dialog)

    def open_import(self) -> ImportDialog:
        dialog = ImportDialog(parent=self)
        dialog.chosen.connect(self.import_chosen)
        return self._show(dialog)

    def open_export(self) -> ExportDialog:
        dialog = ExportDialog(parent=self)
        dialog.chosen.connect(self.export_chosen)
        return self._show(dialog)

    def _show(self, dialog):
        dialog.setAttribute(Qt.WidgetAttribute.WA_DeleteOnClose)
        self.dialog = dialog
        dialog.open()
        return dialog

    # --- palette and layout ----------------------------------------------------
    def apply_palette(self) -> None:
        """Re-colour the plots from the current system palette."""
        background, foreground = plot_colours()
        for plot in self.findChildren(pg.PlotWidget):
            plot.setBackground(background)
            for side in ("bottom", "left"):
                axis = plot.getPlotItem().getAxis(side)
                axis.setPen(pg.mkPen(foreground))
                axis.setTextPen(pg.mkPen(foreground))

    def _on_scheme_changed(self, scheme: Qt.ColorScheme) -> None:
        self.apply_palette()

    def changeEvent(self, event: QEvent) -> None:
        if event.type() in (QEvent.Type.PaletteChange, QEvent.Type.ApplicationPaletteChange):
            self.apply_palette()
        super().changeEvent(event)

    def save_layout(self) -> None:
        if self.settings is None:
            return
        self.settings.setValue("window/geometry", self.saveGeometry())
        self.settings.setValue("window/state", self.saveState())
        self.settings.setValue("window/splitter", self.splitter.saveState())
        self.settings.setValue("alerts/operator", self.alert_panel.operator.text())
        self.settings.sync()

    def text_scale(self) -> float:
        """How much larger the alert list and status bar are than at 1366 px wide (1 to 1.6)."""
        return min(max(self.width() / 1366.0, 1.0), 1.6)

    def _scale_text(self) -> None:
        scale = self.text_scale()
        if abs(scale - self._scaled) < 0.02:
            return
        self._scaled = scale
        for widget, base in self._base_fonts:
            font = QFont(widget.font())
            font.setPointSizeF(base * scale)
            widget.setFont(font)

    def resizeEvent(self, event) -> None:
        super().resizeEvent(event)
        self._scale_text()

    def fit_to_screen(self) -> None:
        """Open filling the current screen's available area (whatever size it had last time)."""
        screen = self.screen() or QGuiApplication.primaryScreen()
        if screen is None:
            self.resize(1366, 768)
            return
        self.setGeometry(screen.availableGeometry())

    def _restore(self) -> None:
        if self.settings is None:
            return
        for key, restore in (("window/state", self.restoreState), ("window/splitter", self.splitter.restoreState)):
            value = self.settings.value(key)
            if isinstance(value, QByteArray) and not value.isEmpty():
                restore(value)
        self.alert_panel.operator.setText(str(self.settings.value("alerts/operator", "") or ""))

    def closeEvent(self, event: QCloseEvent) -> None:
        self.save_layout()
        self.overview.disconnect_board()
        self.alert_panel.disconnect_book()
        for page in self.pages.values():
            page.disconnect_book()
        super().closeEvent(event)

