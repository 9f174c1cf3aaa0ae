"""An animal's pages from the lab database, as the rig PC shows them, read-only.

Rule: one home per computation. The lab animal's rows (sessions, trials,
fits, care entries, events of sessions without trials and of the latest
session) are copied into a scratch SQLite store
(monitor.store.lab_read.copy_animal), and the rig PC's own code builds the
page from that store exactly as it does from its own: the history reader
(window.pages.StoreHistory), the cached fit (store.fits.cached_block),
views.history_parts and views.page_state, the eligibility judgement and the
care day (app.animal_records) and their lines (app.eligibility_care). The
first tab shows the latest session replayed through the live view's code
(store.derive.session_replayed, views.today_state) against the session
before. The lab is read in a worker thread; the page opens when its data is
ready. Nothing is written anywhere: the page hides check-in, decision,
exclusion, condition, manipulation and care-entry buttons and says so; the
decision history opens read-only with each PC's chain check. Advisory: the
approved animal-use protocol, the animal-care committee and the veterinarian
decide.
"""

from __future__ import annotations

import tempfile
import threading
from datetime import date, datetime
from pathlib import Path
from typing import Any, Callable, NamedTuple

from PySide6.QtCore import QObject, Qt, Signal
from PySide6.QtWidgets import QVBoxLayout, QWidget

from monitor.core.care.ledger import CareConfig
from monitor.ui.decision_history import DecisionHistory, HistoryView
from monitor.ui.models import AnimalPageState, TodayState
from monitor.ui.owners import AnimalBook

READ_ONLY_NOTE = ("Read-only copy from the lab database: check-in, decisions, exclusions, conditions, manipulations "
                  "and care entries are recorded on the rig PC that trains the animal.")


LATEST_TAB = "Latest session"     # the live page's first tab, for a session that has ended


class LabPage(NamedTuple):
    """What a lab animal's page shows: the page itself and its decision history."""

    state: AnimalPageState
    history: HistoryView


class ReadJob:
    """The history reader's job handle for a lab read: progress goes nowhere, a closed view cancels."""

    def __init__(self, cancelled: Callable[[], bool]) -> None:
        self.cancelled = cancelled

    def progress(self, fraction: float, message: str = "") -> None:
        from monitor.app.window.jobs import Cancelled

        if self.cancelled():
            raise Cancelled()


def read_page(url: str, animal: str, config: CareConfig, now: datetime | None = None,
              cancelled: Callable[[], bool] = lambda: False) -> LabPage:
    """The page of the lab animal shown as `animal`, built by the rig PC's code from a scratch copy (see the
    module rule); LabError when the lab cannot be read or holds no such animal."""
    from monitor.store.lab_read import copy_animal

    now = now or datetime.now().astimezone()
    with tempfile.TemporaryDirectory(prefix="rigside-lab-page-") as directory:
        copy = copy_animal(url, animal, directory)
        where = f"lab copy, trained on {', '.join(pc for pc, _ in copy.chains)}"
        return LabPage(page_from_store(copy.path, animal, config, now, ReadJob(cancelled), where),
                       _history(animal, copy.decisions, copy.chains))


def page_from_store(path: Path, animal: str, config: CareConfig, now: datetime, job: ReadJob,
                    where: str | None = None) -> AnimalPageState:
    """An animal's page from the store at `path` by the rig PC's own code (history, cached fit, judgement, care
    day, latest session); `where` is said where the rig PC names the box."""
    from monitor.app.live import views
    from monitor.app.services.judging import RuleError, care_day, judge
    from monitor.app.window.pages import StoreHistory
    from monitor.app.window.eligibility_care import care_text, eligibility_text
    from monitor.store.db import open_store
    from monitor.store.derive import protocol_of
    from monitor.store.fits import cached_block
    from monitor.store.manipulations import latest_protocol_text

    conn = open_store(path, readonly=True)
    try:
        text = latest_protocol_text(conn, animal)
        protocol = protocol_of(text) if text is not None else None
        judgement = None
        try:
            judgement = judge(conn, animal)
            eligibility = eligibility_text(judgement.verdict if judgement is not None else None)
        except RuleError as exc:
            eligibility = str(exc)
        care = care_day(conn, [animal], date.fromordinal(now.toordinal()), config, now)
        block = cached_block(conn, animal, None)
    finally:
        conn.close()
    parts = panel = latest = None
    if protocol is not None:
        sessions = StoreHistory(path).sessions(animal, protocol, job)  # type: ignore[arg-type]
        parts = views.history_parts(protocol, sessions, block)
        if judgement is not None:        # as the rig PC's page shows it once the animal is judged
            panel = views.with_figures(parts.consolidation, judgement.figures)
        if sessions and sessions[-1].session_id is not None:
            latest = _latest_session(path, animal, sessions[-1].session_id,
                                     views.stage_intervals(sessions[-2]) if len(sessions) > 1 else None)
    return views.page_state(animal, where, protocol.name if protocol else "no protocol", latest, parts,
                            care_text(care[0]) if care else "", eligibility, panel)


def _latest_session(path: Path, animal: str, session_id: int,
                    previous: dict[str, tuple[float, ...]] | None) -> TodayState | None:
    """The latest session's part of the page (histograms against the session before, rolling hit rate), as the
    live page showed it: its events replayed through the live view's own code."""
    from monitor.app.live import views
    from monitor.app.live.engine import RigSnapshot
    from monitor.store.db import open_store
    from monitor.store.derive import session_replayed

    conn = open_store(path, readonly=True)
    try:
        live = session_replayed(conn, session_id)
    finally:
        conn.close()
    if live is None:
        return None
    snapshot = RigSnapshot(rig="", version=0, session_id=session_id, animal=animal, started=None, ended=True,
                           live=live.snapshot(), series=live.stats.rate_series(), disagreements=0, events=0,
                           malformed=0, last_event_at=None, newest_stamp=0.0)
    return views.today_state(snapshot, previous)


def _history(animal: str, entries: tuple[Any, ...], chains: tuple[tuple[str, Any], ...]) -> HistoryView:
    """The animal's entries from every PC it trained on, and each PC's chain check in words."""
    from monitor.app.window.eligibility_care import history_view

    checks = [(pc, history_view(animal, (), check)) for pc, check in chains]
    rows = history_view(animal, entries, chains[0][1]).rows if chains else ()
    text = " ".join(f"{pc}: {check.chain_text}" for pc, check in checks) or "No decision log in the lab."
    return HistoryView(animal, rows, all(check.chain_ok for _, check in checks), text)


class LabPageWindow(QWidget):
    """A lab animal's page in a window of its own: the rig PC's AnimalPage, read-only."""

    def __init__(self, page: LabPage, parent: QWidget | None = None) -> None:
        from monitor.ui.animal_page import AnimalPage

        super().__init__(parent, Qt.WindowType.Window)
        self.setWindowTitle(f"{page.state.animal} — from the lab database (read-only)")
        self.resize(1100, 760)
        self.book = AnimalBook(self)
        self.book.update(page.state)
        self.history = page.history
        self.page = AnimalPage(self.book, page.state.animal)
        self.page.make_read_only(READ_ONLY_NOTE)
        self.page.sections.setTabText(0, LATEST_TAB)
        self.page.history_requested.connect(lambda _animal: self.open_history())
        self.dialog: DecisionHistory | None = None
        layout = QVBoxLayout(self)
        layout.setContentsMargins(0, 0, 0, 0)
        layout.addWidget(self.page)

    def open_history(self) -> DecisionHistory:
        self.dialog = DecisionHistory(self.history, self)
        self.dialog.show()
        return self.dialog


class LabPages(QObject):
    """Opens lab animals' pages: each read in a worker thread, shown on the GUI thread when ready."""

    _ready = Signal(str, object)     # animal, LabPage or an error message

    def __init__(self, parent: QObject, config: CareConfig, say: Callable[[str], None]) -> None:
        super().__init__(parent)
        self.config, self.say = config, say
        self.windows: dict[str, LabPageWindow] = {}
        self.reading: set[str] = set()
        self.closed = False
        self._ready.connect(self._show)

    def open(self, url: str, animal: str) -> None:
        """Read the animal's page from the lab off the GUI thread, then show it (once per animal at a time)."""
        if animal in self.reading:
            return
        self.reading.add(animal)
        self.say(f"Reading {animal} from the lab…")

        def work() -> None:
            from monitor.store.lab_schema import LabError

            try:
                result: LabPage | str = read_page(url, animal, self.config, cancelled=lambda: self.closed)
            except LabError as exc:
                result = str(exc)
            except Exception as exc:  # noqa: BLE001 - said on screen, the window goes on
                result = f"cannot read {animal} from the lab ({type(exc).__name__}: {exc})"
            if not self.closed:
                try:
                    self._ready.emit(animal, result)
                except RuntimeError:      # the window closed meanwhile: nobody to show it to
                    pass

        threading.Thread(target=work, name=f"lab page {animal}", daemon=True).start()

    def _show(self, animal: str, result: LabPage | str) -> None:
        self.reading.discard(animal)
        if isinstance(result, str):
            self.say(result)
            return
        old = self.windows.pop(animal, None)
        if old is not None:
            old.close()
        window = LabPageWindow(result)
        window.setAttribute(Qt.WidgetAttribute.WA_DeleteOnClose)
        window.destroyed.connect(lambda *_: self.windows.pop(animal, None) if self.windows.get(animal) is window
                                 else None)
        self.windows[animal] = window
        window.show()
        self.say(f"{animal}: page from the lab (read-only).")

    def stop(self) -> None:
        """Drop reads still running and close the pages."""
        self.closed = True
        for window in list(self.windows.values()):
            window.close()
