"""The window's animal pages: each animal's history and consolidation fit, loaded off the GUI thread, and pushed.

Rule: an animal's history (monitor.store.history) is loaded in a worker job,
one at a time (the GUI keeps its share of the interpreter lock), animals
with an open page first; the fit shown is the one cached in the store, and
when there is none or the data changed since (a session ended or was
excluded), the model is refitted in a child process (one at a time per core)
that caches the new fit, and the page is pushed again. `push(animal)` builds
the page's view state from its live part (the rig's latest snapshot), its
history parts and the eligibility's own figures, and hands it to the
AnimalBook, which announces it only when it changed. Exclusions and
conditions asked for on a page are written through the store writer.
"""

from __future__ import annotations

import contextlib
import threading
import time
from dataclasses import replace
from datetime import datetime
from pathlib import Path
from typing import Any, Callable, Protocol

from monitor.app.live import views
from monitor.app.live.engine import RaisedAlert
from monitor.app.live.fraction import live_text
from monitor.app.rigs import LoadedProtocol
from monitor.app.window.jobs import Cancelled, Job
from monitor.app.window.rig_sessions import Rig
from monitor.core.alerts import plateau_alert
from monitor.core.protocol import TrainingProtocol
from monitor.store.history import HistorySession
from monitor.ui.models import ConditionRecord, Exclusion, TodayState


class HistoryProvider(Protocol):
    """An animal's past sessions, segmented (runs in a worker thread)."""

    def sessions(self, animal: str, protocol: TrainingProtocol, job: Job) -> list[HistorySession]: ...


class StoreHistory:
    """Past (ended) sessions of an animal read from the store, in time order (monitor.store.history)."""

    def __init__(self, path: Path) -> None:
        self.path = Path(path)

    def sessions(self, animal: str, protocol: TrainingProtocol, job: Job) -> list[HistorySession]:
        from monitor.app.store_access import read_job
        from monitor.store.history import ended_sessions

        return read_job(self.path, lambda conn: ended_sessions(conn, animal, protocol, job.progress))(job)


class Pages:
    """Histories, fits and the open pages; GUI thread, except the jobs' work."""

    def __init__(self, controller, history: HistoryProvider, fit_consolidation: bool) -> None:
        self.c = controller
        self.history = history
        self.fit_consolidation = fit_consolidation
        self.open_pages: set[str] = set()
        self.history_parts: dict[str, views.HistoryParts] = {}
        self.fits: dict[str, Any] = {}
        self.loading: dict[str, Job] = {}       # animals whose history is being loaded
        self._reload: set[str] = set()          # animals whose data changed while their history was loading
        self._live_panels: dict[str, tuple] = {}  # animal -> (history panel, fraction, panel with it)
        self._measured_panels: dict[str, tuple] = {}  # animal -> (panel, figures, panel with those measures)
        self._today: dict[str, tuple[int, TodayState | None]] = {}
        self._plateau: dict[str, bool] = {}
        self._heavy = threading.Condition()   # one history load at a time: the GUI keeps its share of the GIL
        self._heavy_busy = False
        self._heavy_waiting: list[str] = []
        self._fit_slots: threading.BoundedSemaphore | None = None   # fits in child processes: one per core

    # --- history ------------------------------------------------------------------------------------
    def load_history(self, animal: str, refresh: bool = False) -> None:
        """Load (or reload) an animal's history and its consolidation fit, off the GUI thread."""
        if animal in self.loading:
            if refresh:                      # the data changed under a load in progress: load again after it
                self._reload.add(animal)
            return
        if animal in self.history_parts and not refresh:
            return
        loaded = self.protocol_of(animal)
        if loaded is None:
            return
        protocol = loaded.protocol

        def work(job: Job):
            with self._heavy_turn(job, animal):
                sessions = self.history.sessions(animal, protocol, job)
                cached = self._cached_fit(animal)
                parts = views.history_parts(protocol, sessions, cached)
            self.c.jobs.post(lambda: self._history_ready(animal, parts))
            if not self.fit_consolidation or cached["current"]:
                return parts, cached
            from monitor.store.consolidation_fits import refit_in_process

            with self._fit_turn(job):
                block = refit_in_process(
                    self.c.writer.path, [animal], cancel=job.cancelled,
                    progress=lambda _a, f, m: job.progress(f, f"consolidation model: {m}"))[animal]
            if block is None:
                if job.cancelled():
                    raise Cancelled()
                raise RuntimeError("the consolidation fit ended without a result")
            block = self._cached_fit(animal) or block     # as saved, with the filter for this session's trials
            return views.history_parts(protocol, sessions, block), block

        def over() -> None:
            self.loading.pop(animal, None)
            if animal in self._reload:
                self._reload.discard(animal)
                self.load_history(animal, refresh=True)

        def done(result) -> None:
            parts, block = result
            changed = (block or {}).get("live") != (self.fits.get(animal) or {}).get("live")
            self.fits[animal] = block
            if changed:                                   # a new fit: follow the session from it
                self._follow(animal)
            self._history_ready(animal, parts)
            over()

        self.loading[animal] = self.c.run_job(f"history of {animal}", work, done, failed=over)

    def _cached_fit(self, animal: str) -> dict[str, Any]:
        """The store's newest consolidation block of `animal`, with "current" and "live" (any thread)."""
        from monitor.app.store_access import read_job
        from monitor.store.history import fit_block

        return read_job(Path(self.c.writer.path), lambda conn: fit_block(conn, animal))(None)

    @contextlib.contextmanager
    def _heavy_turn(self, job: Job, animal: str):
        """Wait (cancellably) for the one slot for heavy work; animals with an open page go first."""
        with self._heavy:
            self._heavy_waiting.append(animal)
            try:
                while self._heavy_busy or (animal not in self.open_pages
                                           and any(a in self.open_pages for a in self._heavy_waiting)):
                    if job.cancelled():
                        raise Cancelled()
                    self._heavy.wait(0.2)
                self._heavy_busy = True
            finally:
                self._heavy_waiting.remove(animal)
        try:
            yield
        finally:
            with self._heavy:
                self._heavy_busy = False
                self._heavy.notify_all()

    @contextlib.contextmanager
    def _fit_turn(self, job: Job):
        """Wait (cancellably) for one of the fit slots: as many as the PC has cores, since each fit runs in its
        own child process and this thread only waits for it (the heavy slot stays free for history loads)."""
        from monitor.store.consolidation_fits import worker_count

        with self._heavy:   # created once, by whichever job comes first
            if self._fit_slots is None:
                self._fit_slots = threading.BoundedSemaphore(worker_count(1 << 16))
        while not self._fit_slots.acquire(timeout=0.2):
            if job.cancelled():
                raise Cancelled()
        try:
            yield
        finally:
            self._fit_slots.release()

    def protocol_of(self, animal: str) -> LoadedProtocol | None:
        """The protocol an animal's history is read with: its own, else its rig's."""
        if animal in self.c.protocols:
            return self.c.protocols[animal]
        rig = self.c.sessions.rig_of(animal)
        return rig.protocol if rig is not None else None

    def history_stages(self) -> dict[str, str]:
        """Each loaded animal's stage at the end of its latest session with one."""
        out = {}
        for animal, parts in self.history_parts.items():
            stage = next((row.stage for row in reversed(parts.sessions) if row.stage), None)
            if stage:
                out[animal] = stage
        return out

    def _history_ready(self, animal: str, parts: views.HistoryParts) -> None:
        self.history_parts[animal] = parts
        alert = plateau_alert(self._plateau.get(animal), parts.plateau_reached, parts.plateau_session,
                              parts.plateau_reason)
        self._plateau[animal] = parts.plateau_reached
        if alert is not None:
            rig = self.c.sessions.rig_of(animal)
            self.c.alerts.push(RaisedAlert(rig.spec.name if rig else "", animal, alert, time.time()))
        self.c.refresh_roster()
        self.push(animal)
        if self.c.decisions_and_care is not None:
            self.c.decisions_and_care.update([animal])

    def session_started(self, animal: str) -> None:
        """A session of `animal` began: the engine follows it from the fit known, and the history (and fit) are
        loaded if they are not yet."""
        self._follow(animal)
        self.load_history(animal)

    def _follow(self, animal: str) -> None:
        """Have the engine follow the animal's running session from its cached fit (monitor.app.live.fraction)."""
        rig, block, loaded = self.c.sessions.rig_of(animal), self.fits.get(animal) or {}, self.protocol_of(animal)
        if rig is not None and rig.session_id is not None and block.get("live") and loaded is not None:
            self.c.engine.follow(rig.spec.name, rig.session_id, block["live"], loaded.protocol.final_stage.name)

    # --- pages ------------------------------------------------------------------------------------------
    def opened(self, animal: str) -> None:
        self.open_pages.add(animal)
        self.load_history(animal)
        self.push(animal)

    def closed(self, animal: str) -> None:
        self.open_pages.discard(animal)

    def push(self, animal: str) -> None:
        """Hand the animal's page, as it is now, to the AnimalBook (only an open page)."""
        if animal not in self.open_pages:
            return
        rig = self.c.sessions.rig_of(animal)
        loaded = self.protocol_of(animal)
        today = None
        if rig is not None and rig.snapshot is not None and rig.snapshot.animal == animal:
            version, cached = self._today.get(animal, (-1, None))
            if version != rig.snapshot.version:
                parts = self.history_parts.get(animal)
                cached = views.today_state(rig.snapshot, parts.previous_intervals if parts else None,
                                           time.monotonic())
                self._today[animal] = (rig.snapshot.version, cached)
            today = cached
        care, eligibility = self.c.decisions_and_care.texts(animal) if self.c.decisions_and_care is not None else ("", "")
        parts = self.history_parts.get(animal)
        panel = self._live_panel(animal, rig) or (parts.consolidation if parts else None)
        self.c.book.update(views.page_state(animal, rig.spec.name if rig else None,
                                            loaded.protocol.name if loaded else "", today,
                                            parts, care, eligibility, self._measured(animal, panel)))

    def _measured(self, animal: str, panel):
        """The panel with the eligibility's own figures as its measures (the same session, the same definition
        as the eligibility line), once the animal is judged; the same object until either changes."""
        figures = self.c.decisions_and_care.figures.get(animal) if self.c.decisions_and_care is not None else None
        if panel is None or figures is None:
            return panel
        before = self._measured_panels.get(animal)
        if before is not None and before[0] is panel and before[1] is figures:
            return before[2]
        out = views.with_figures(panel, figures)
        self._measured_panels[animal] = (panel, figures, out)
        return out

    def _live_panel(self, animal: str, rig: Rig | None):
        """The consolidation panel with this session's figure from the engine's snapshot (the same object until the
        engine followed a new trial)."""
        parts, block = self.history_parts.get(animal), self.fits.get(animal) or {}
        snapshot = rig.snapshot if rig is not None else None
        fraction = snapshot.fraction if snapshot is not None and snapshot.animal == animal \
            and snapshot.session_id == rig.session_id else None
        if parts is None or fraction is None:
            return None
        before = self._live_panels.get(animal)
        if before is not None and before[0] is parts.consolidation and before[1] is fraction:
            return before[2]
        panel = replace(parts.consolidation, live_text=live_text(fraction, block.get("session")))
        self._live_panels[animal] = (parts.consolidation, fraction, panel)
        return panel

    # --- exclusions and conditions ------------------------------------------------------------------
    def _record(self, what: str, animal: str, index: int, fn: Callable[[Any, int, str], Any]) -> None:
        parts = self.history_parts.get(animal)
        session_id = parts.session_ids[index - 1] if parts is not None and 1 <= index <= len(parts.session_ids) \
            else None
        operator = self.c.operator()
        if session_id is None or not operator:
            why = "session not found in the store" if session_id is None else "type your name in the Operator field first"
            self.c.say(f"{what} not saved: {why}.")
            return
        self.c.run_job(f"{what} for {animal}", lambda job: self.c.writer.call(lambda c: fn(c, session_id, operator)),
                       lambda _: self.load_history(animal, refresh=True))

    def exclude(self, record: Exclusion) -> None:
        """Flag a session excluded with its reason (kept, left out of curves and fits), or count it again;
        either is logged."""
        from monitor.store.session_changes import set_excluded

        self._record("exclusion" if record.excluded else "undoing the exclusion", record.animal, record.session,
                     lambda c, sid, who: set_excluded(c, sid, record.excluded, reason=record.reason, operator=who))

    def add_condition(self, record: ConditionRecord) -> None:
        from monitor.store import registry

        at = datetime.now().astimezone().isoformat(timespec="seconds")
        self._record("condition", record.animal, record.session, lambda c, sid, who: registry.add_condition(
            c, sid, what=record.what, operator=who, at=at, dose=record.dose or None, volume_ul=record.volume_ul,
            sham=record.sham, notes=record.note or None))
