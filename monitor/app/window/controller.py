"""The controller: sources → Fanout → (store writer, engine) → a ~20 Hz timer on the GUI thread → owners.

Rule: the composition root of the desktop app. Each rig is one source (serial
or file) whose reader thread calls its `Fanout`; the store writer and the
engine run in their own threads. A QTimer on the GUI thread (`refresh`, ~20
Hz) runs the callables workers posted, takes the engine's latest snapshots and
alerts, and pushes view models to the RigBoard, AnimalBook and AlertBook,
which announce only what changed (so an unchanged tile is not repainted).
Everything that may wait (store calls, loading an animal's history) runs in
a worker thread with progress and cancel, and hands its result back through
the inbox; the consolidation model is refitted in a separate process (the
GUI's interpreter lock stays free) and cached in the store, and a page shows
the cached fit. Check-in closes the rig's
session and starts a new one (the engine first, then the Fanout); check-out
ends it. Before any check-in a rig's events are kept in a session with no
animal (animal ''). `close()` stops the sources, ends open sessions and
flushes the writer; every platform's stop requests call it (monitor.app.stopping).
"""

from __future__ import annotations

import contextlib
import json
import queue
import sqlite3
import sys
import threading
import time
from dataclasses import replace
from datetime import datetime
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any, NamedTuple, Protocol as TypingProtocol

from PySide6.QtCore import QObject, Qt, QTimer
from PySide6.QtWidgets import QApplication, QLabel, QProgressBar, QPushButton

from drivers.status import Batch
from drivers.wire import Event, WireDecoder
from monitor.app.window.alerting import AlertCentre, AlertStore, TableAlertStore
from monitor.app.live.engine import Engine, RaisedAlert, RigSnapshot, SessionPlan
from monitor.app.live.fraction import LiveFractions, live_text, session_start_wall
from monitor.app.live.pipeline import Fanout
from monitor.app.stopping import StopRequests
from monitor.app.live import views
from monitor.core.alerts import AlertRules, plateau_alert, store_alert
from monitor.core.protocol import Protocol, parse_protocol
from monitor.core.session.live_stats import LiveSession
from monitor.store import db
from monitor.store.writer import StoreWriter
from monitor.ui.models import CheckIn, CheckOut, ConditionRecord, Exclusion, Roster, RigSetup, TodayState, UnattendedGift
from monitor.ui.owners import AlertBook, AnimalBook, RigBoard

REFRESH_MS = 50
SWITCH_INTERVAL_S = 0.001  # Python's default 5 ms let 16 reader threads delay each Qt call (bench_latency.py)
NO_ANIMAL = ""  # the sessions row of a rig's events before anyone checked in


class RigSpec(NamedTuple):
    """One rig on this PC: its source and its default protocol."""

    name: str
    kind: str                        # "serial" | "file"
    path: str
    protocol_path: Path
    usb_serial: str | None = None
    mapping_path: Path | None = None
    valve_ul_per_ms: float | None = None
    wait_for_header: bool = True


class LoadedProtocol(NamedTuple):
    protocol: Protocol
    text: str
    path: Path


def load_protocol(path: Path) -> LoadedProtocol:
    text = Path(path).read_text(encoding="utf-8")
    return LoadedProtocol(parse_protocol(text, str(path)), text, Path(path))


def decoder_factory(mapping_path: Path | None) -> Callable[[], Any]:
    """A new line decoder per source: the wire format, or a lab's mapped format."""
    if mapping_path is None:
        return WireDecoder
    from drivers.mapping import MappedDecoder, load_mapping

    mapping = load_mapping(mapping_path)
    return lambda: MappedDecoder(mapping)


class Cancelled(Exception):
    """A worker job was cancelled."""


class Job:
    """A worker's handle: report progress, check for cancel (any thread)."""

    def __init__(self, title: str, post: Callable[[Callable[[], None]], None],
                 on_progress: Callable[[str, float, str], None]) -> None:
        self.title = title
        self._post, self._on_progress = post, on_progress
        self.cancel_event = threading.Event()

    def progress(self, fraction: float, message: str = "") -> None:
        if self.cancel_event.is_set():
            raise Cancelled()
        self._post(lambda: self._on_progress(self.title, fraction, message))

    def cancelled(self) -> bool:
        return self.cancel_event.is_set()


class HistoryProvider(TypingProtocol):
    """An animal's past sessions, segmented (runs in a worker thread)."""

    def sessions(self, animal: str, protocol: Protocol, job: Job) -> list[views.HistorySession]: ...


def segment(protocol: Protocol, events: Sequence[Event], stage: str | None = None) -> tuple[list, dict, float]:
    """Trials, builder counts and water of one session's events (as the live view counts them)."""
    live = LiveSession(protocol, stage)
    for event in events:
        live.feed(event)
    live.finish()
    return live.trials, dict(live.builder.counts), live.stats.water_ul


def _hours_between(end: float | None, start: float | None) -> float:
    if end is None or start is None or start <= end:
        return 23.0
    return (start - end) / 3600.0


def store_v2() -> bool:
    """Whether the store's records API (check-in, exclusions, derived trials, alerts table) is installed."""
    try:
        import monitor.store.derive  # noqa: F401
        import monitor.store.records  # noqa: F401
    except ImportError:
        return False
    return True


class StoreHistory:
    """Past (ended) sessions of an animal read from the store, in time order.

    With the store's derived trials (store v2) those are read; a session without
    them (recorded before, or not derived yet) is segmented from its events here.
    """

    def __init__(self, path: Path) -> None:
        self.path = Path(path)

    def sessions(self, animal: str, protocol: Protocol, job: Job) -> list[views.HistorySession]:
        conn = db.open_store(self.path, readonly=True)
        try:
            columns = {row[1] for row in conn.execute("PRAGMA table_info(sessions)")}
            v2 = "excluded" in columns and store_v2()
            extra = ", excluded, coalesce(exclusion_reason, '')" if v2 else ", 0, ''"
            rows = conn.execute(f"SELECT id, rig, start_wall, started_at, ended_at{extra} FROM sessions "
                                "WHERE animal = ? AND ended_at IS NOT NULL ORDER BY started_at, id",
                                (animal,)).fetchall()
            stored, builds, conditions = {}, {}, {}
            if v2:
                from monitor.store.derive import trials_by_session
                from monitor.store.records import conditions_of

                ids = [r[0] for r in rows]
                stored = trials_by_session(conn, ids)
                for marks in (ids[i:i + 500] for i in range(0, len(ids), 500)):
                    query = ("SELECT session_id, counts, water_ul, malformed FROM trial_builds WHERE session_id IN "
                             f"({', '.join('?' * len(marks))})")
                    builds.update({r[0]: r[1:] for r in conn.execute(query, marks)})
                conditions = {i: "; ".join(c["what"] for c in conditions_of(conn, i)) for i in ids}
            out: list[views.HistorySession] = []
            previous_end = None
            for k, (session_id, rig, start_wall, started, ended, excluded, reason) in enumerate(rows):
                job.progress(k / max(len(rows), 1), f"session {k + 1} of {len(rows)}")
                if session_id in builds:
                    counts_text, water, malformed = builds[session_id]
                    trials, counts = stored.get(session_id, []), json.loads(counts_text)
                else:
                    trials, counts, water = segment(protocol, self._events(conn, session_id))
                    malformed = conn.execute("SELECT count(*) FROM raw_lines WHERE session_id = ? AND kind = "
                                             "'malformed'", (session_id,)).fetchone()[0]
                out.append(views.HistorySession(
                    tuple(trials), start_wall[:16].replace("T", " "), rig, counts, water, malformed, bool(excluded),
                    reason, conditions.get(session_id, ""), _hours_between(previous_end, started), session_id))
                previous_end = ended
            return out
        finally:
            conn.close()

    @staticmethod
    def _events(conn: sqlite3.Connection, session_id: int) -> list[Event]:
        return [Event(t_us, name, tuple((value or "").split()) if name != "note" else (value or "",), raw, seg, line,
                      0, 0)
                for seg, line, t_us, raw, name, value in conn.execute(
                    "SELECT e.segment, e.line, e.t_us, e.raw_time, c.name, e.value FROM events e "
                    "JOIN event_codes c ON c.code = e.code WHERE e.session_id = ? ORDER BY e.rowid", (session_id,))]


def _end_session(conn: sqlite3.Connection, session_id: int, operator: str = "") -> None:
    """Check out (store v2: the check-in record too, with who did it, then derive the session's trials), else
    end it."""
    if not store_v2():
        db.end_session(conn, session_id)
        return
    from monitor.store import derive, records, session_changes

    try:
        records.check_out(conn, session_id)
        if operator.strip():
            session_changes.checked_out_by(conn, session_id, operator)
    except records.RecordError:           # a session opened without a check-in record
        db.end_session(conn, session_id)
    derive.rebuild_trials(conn, session_id)


def _stated_stage(rig: "_Rig") -> str | None:
    """The stage the box itself last sent (`param stage`), before or during a session; None if it never did."""
    params = rig.snapshot.params if rig.snapshot is not None else ()
    return next((e.args[1] for e in reversed(params) if e.args[0] == "stage"), None)


class _Rig:
    def __init__(self, spec: RigSpec, protocol: LoadedProtocol, source: Any, fanout: Fanout, source_id: int) -> None:
        self.spec, self.protocol, self.source, self.fanout, self.source_id = spec, protocol, source, fanout, source_id
        self.session_id: int | None = None          # the checked-in session
        self.idle_session_id: int | None = None
        self.animal: str | None = None
        self.snapshot: RigSnapshot | None = None


class Controller(QObject):
    """Wires the live path and the window; GUI thread only (except where a method says otherwise)."""

    def __init__(self, writer: StoreWriter, *, history: HistoryProvider | None = None,
                 rules: AlertRules = AlertRules(), alert_store: AlertStore | None | str = "store",
                 protocols: dict[str, LoadedProtocol] | None = None, refresh_ms: int = REFRESH_MS,
                 fit_consolidation: bool = True, parent: QObject | None = None) -> None:
        super().__init__(parent)
        self.writer = writer
        self.history = history or StoreHistory(writer.path)
        self.engine = Engine(rules=rules)
        self.board, self.book, self.alert_book = RigBoard(self), AnimalBook(self), AlertBook(self)
        if alert_store == "store":       # the store's alerts table when it has one, else nothing is kept
            alert_store = TableAlertStore(writer) if store_v2() else None
        self.alerts = AlertCentre(self.alert_book, alert_store)
        self.protocols: dict[str, LoadedProtocol] = dict(protocols or {})   # by animal
        self.fit_consolidation = fit_consolidation
        self.rigs: dict[str, _Rig] = {}
        self.window = None
        self.records = None          # eligibility and care (monitor/app/window/eligibility_care.py) once a window attaches
        self.recorded_animals: set[str] = set()  # added in the animals window this run (offered at check-in)
        self.animal_records = None   # the animals window's side (monitor/app/window/animal_window.py) once a window attaches
        self.open_pages: set[str] = set()
        self.history_parts: dict[str, views.HistoryParts] = {}
        self.fits: dict[str, Any] = {}
        self._loading: dict[str, Job] = {}
        self._reload: set[str] = set()          # animals whose data changed while their history was loading
        self.live_fractions = LiveFractions()   # this session's slow-state fraction from the cached fit
        self._live_panels: dict[str, tuple] = {}  # animal -> (history panel, fraction, panel with it)
        self._measured_panels: dict[str, tuple] = {}  # animal -> (panel, figures, panel with those measures)
        self._followed: dict[str, tuple | None] = {}  # animal -> (fraction, missed) of its session so far
        self._today: dict[str, tuple[int, TodayState | None]] = {}
        self._plateau: dict[str, bool] = {}
        self.stored_stages: dict[str, str] = {}   # animal -> stage of its latest stored session
        self._store_failing = False
        self._status_shown = None
        self._inbox: queue.SimpleQueue[Callable[[], None]] = queue.SimpleQueue()
        self._jobs: list[Job] = []
        self._heavy = threading.Condition()   # one history load at a time: the GUI keeps its share of the GIL
        self._heavy_busy = False
        self._heavy_waiting: list[str] = []
        self._fit_slots: threading.BoundedSemaphore | None = None   # fits in child processes: one per core
        self.progress_bar: QProgressBar | None = None
        self.progress_label: QLabel | None = None
        self.cancel_button: QPushButton | None = None
        self.painted: list[tuple[str, float]] = []    # (rig, reader stamp) of tile states handed to the board
        self.refresh_seconds: list[float] = []
        self.closed = False
        self._stops: StopRequests | None = None
        self.timer = QTimer(self)
        self.timer.setInterval(refresh_ms)
        self.timer.timeout.connect(self.refresh)

    # --- start, stop -----------------------------------------------------------------------
    def start(self, switch_interval_s: float = SWITCH_INTERVAL_S) -> None:
        """Start the engine and the timer; shorten the interpreter's thread switch interval so the GUI
        thread gets the GIL back within ~1 ms from the reader, engine and writer threads."""
        sys.setswitchinterval(switch_interval_s)
        self.engine.start()
        self.timer.start()

    def attach(self, window, care=None) -> None:
        """Connect a MainWindow's requests and put the job progress into its status bar; `care`: a CareConfig."""
        self.window = window
        window.checked_in.connect(self.check_in)
        window.checked_out.connect(self.check_out)
        window.rig_added.connect(self._rig_from_setup)
        window.page_opened.connect(self.page_opened)
        window.page_closed.connect(self.page_closed)
        window.exclusion_requested.connect(self.exclude)
        window.condition_requested.connect(self.add_condition)
        window.unattended_given.connect(self.give_unattended)
        self.progress_label = QLabel()
        self.progress_label.setTextFormat(Qt.TextFormat.PlainText)
        self.progress_bar = QProgressBar()
        self.progress_bar.setFixedWidth(120)
        self.progress_bar.setRange(0, 100)
        self.progress_bar.setFormat("%p %")
        self.cancel_button = QPushButton("Cancel")
        self.cancel_button.setToolTip("Cancel the work in progress")
        self.cancel_button.clicked.connect(self.cancel_jobs)
        for widget in (self.progress_label, self.progress_bar, self.cancel_button):
            window.statusBar().addPermanentWidget(widget)
            widget.hide()
        window.set_roster(self.roster())
        self.load_stored_stages()
        from monitor.app.window.eligibility_care import DecisionsAndCare

        self.records = DecisionsAndCare(self, care)
        self.records.attach(window)
        from monitor.app.window.animal_window import AnimalRecordsSide

        self.animal_records = AnimalRecordsSide(self)
        self.animal_records.attach(window)

        from monitor.app.window.effects_side import EffectsSide

        EffectsSide(self).attach(window)

    def install_signal_handlers(self, app: QApplication) -> None:
        """Every platform's stop requests (monitor.app.stopping) close cleanly (the 20 Hz timer lets
        Python run the handler promptly)."""
        def handler() -> None:
            self.close()
            app.quit()
            QTimer.singleShot(0, app.quit)    # also when the event loop has not started yet
        self._stops = StopRequests(handler).install()

    def close(self) -> bool:
        """Stop the sources, end sessions, flush the store; True when every row was stored."""
        if self.closed:
            return True
        self.closed = True
        self.timer.stop()
        if self._stops is not None:
            self._stops.restore()
        self.cancel_jobs()
        for rig in self.rigs.values():
            rig.source.stop()
        checked_in = [r.session_id for r in self.rigs.values() if r.session_id is not None]
        idle = [r.idle_session_id for r in self.rigs.values() if r.idle_session_id is not None]
        try:
            self.writer.call(lambda c: ([_end_session(c, s) for s in checked_in],
                                        [db.end_session(c, s) for s in idle]))
        except Exception:  # noqa: BLE001 - the events matter more than the end times
            pass
        self.engine.stop()
        stored = self.writer.stop()
        if self._stops is not None:
            self._stops.finished()           # a console close (Windows) may end the process now
        return stored

    # --- rigs ------------------------------------------------------------------------------
    def add_rig(self, spec: RigSpec, start: bool = True,
                source_factory: Callable[[Fanout], Any] | None = None) -> None:
        """Register a rig and start its source now (blocks on the store: for start-up).

        `source_factory(fanout)` replaces the serial or file source (benchmarks, simulators): the
        object it returns needs `start()`, `stop()` and `status() -> SourceStatus`.
        """
        self._start_rig(self._register(spec), start, source_factory)

    def start_source(self, name: str) -> None:
        """Start the reader of a rig added with `start=False` (e.g. once its animal is checked in)."""
        if not self.closed:
            self.rigs[name].source.start()

    def _register(self, spec: RigSpec) -> tuple:
        """The store side of adding a rig (any thread): source row, idle session, resume point."""
        protocol = load_protocol(spec.protocol_path)
        key = str(Path(spec.path).resolve()) if spec.kind == "file" else spec.path
        from monitor.store.source_locks import resource_key  # one recorder per source: refused if busy

        self.writer.hold_source(resource_key(spec.kind, spec.path), "the rigside window")
        source_id = self.writer.call(lambda c: db.register_source(
            c, spec.kind, key, spec.name, spec.usb_serial, str(spec.mapping_path) if spec.mapping_path else None))
        if store_v2():   # the rig's binding and valve calibration (the water ledger converts valve time with it)
            from monitor.store.records import ensure_rig

            self.writer.call(lambda c: ensure_rig(c, spec.name, usb_serial=spec.usb_serial, port=key,
                                                  valve_ul_per_ms=spec.valve_ul_per_ms))
        idle = self.writer.call(lambda c: db.start_session(c, source_id, NO_ANIMAL, spec.name, None, None, None))
        resume = (self.writer.call(lambda c: db.file_position(c, source_id), transaction=False)
                  if spec.kind == "file" else None)
        return spec, protocol, source_id, idle, resume

    def _start_rig(self, registered: tuple, start: bool = True,
                   source_factory: Callable[[Fanout], Any] | None = None) -> None:
        spec, protocol, source_id, idle, resume = registered
        fanout = Fanout(self.writer, source_id=source_id, session_id=idle, live=spec.kind == "serial",
                        engine=self.engine.queue)
        factory = decoder_factory(spec.mapping_path)
        if source_factory is not None:
            source: Any = source_factory(fanout)
        elif spec.kind == "file":
            from drivers.tail import FileTail

            source = FileTail(spec.path, fanout, decoder_factory=factory, resume=resume,
                                   should_pause=lambda: self.writer.backlogged)
        else:
            from drivers.serial import SerialSource

            source = SerialSource(spec.path, fanout, usb_serial=spec.usb_serial, decoder=factory(),
                                  wait_for_header=spec.wait_for_header and spec.mapping_path is None)
        rig = _Rig(spec, protocol, source, fanout, source_id)
        rig.idle_session_id = idle
        self.rigs[spec.name] = rig
        self.engine.add_rig(spec.name, source_id, source.status)
        if start:
            source.start()
        self._refresh_roster()

    def _rig_from_setup(self, setup: RigSetup) -> None:
        spec = RigSpec(setup.name, setup.source, setup.path, Path(setup.protocol_path), setup.serial_number,
                       Path(setup.mapping_path) if setup.mapping_path else None, setup.valve_ul_per_ms, setup.reset)
        self.run_job(f"adding {setup.name}", lambda job: self._register(spec), self._start_rig)

    def roster(self) -> Roster:
        animals = sorted(set(self.protocols) | set(self.stored_stages)
                         | {r.animal for r in self.rigs.values() if r.animal} | self.recorded_animals)
        loaded = [*(r.protocol for r in self.rigs.values()), *self.protocols.values()]
        stages = tuple(dict.fromkeys(s.name for p in loaded for s in p.protocol.stages))   # training order
        usual = {a: tuple(sorted({row.rig for row in parts.sessions if row.rig}))
                 for a, parts in self.history_parts.items()}
        return Roster(animals=tuple(animals), rigs=tuple(self.rigs), stages=stages, usual_rigs=usual,
                      occupied={n: r.animal for n, r in self.rigs.items() if r.animal}, operators=(),
                      current_stage={**self.stored_stages, **self._history_stages()},
                      first_stage={n: r.protocol.protocol.stages[0].name for n, r in self.rigs.items()},
                      box_stage={n: s for n, r in self.rigs.items() if (s := _stated_stage(r)) is not None})

    def _history_stages(self) -> dict[str, str]:
        """Each loaded animal's stage at the end of its latest session with one."""
        out = {}
        for animal, parts in self.history_parts.items():
            stage = next((row.stage for row in reversed(parts.sessions) if row.stage), None)
            if stage:
                out[animal] = stage
        return out

    def load_stored_stages(self) -> None:
        """Read every animal's latest recorded stage from the store (worker), then refresh the roster."""
        from monitor.store.roster import latest_stages

        def work(job: Job) -> dict[str, str]:
            conn = db.open_store(self.writer.path, readonly=True)
            try:
                return latest_stages(conn)
            finally:
                conn.close()

        def done(found: dict[str, str]) -> None:
            self.stored_stages = found
            self._refresh_roster()

        self.run_job("reading the animals' stages", work, done)

    # --- check-in, check-out ---------------------------------------------------------------------
    def check_in(self, record: CheckIn) -> None:
        """Start a session of `record.animal` in `record.rig` (the store call runs in a worker)."""
        rig = self.rigs[record.rig]
        loaded = self.protocols.get(record.animal, rig.protocol)
        carried = rig.snapshot.params if rig.snapshot is not None else ()
        stated = _stated_stage(rig)                      # the box is the witness of its own stage
        stage = stated if stated is not None and loaded.protocol.stage(stated) is not None else record.stage
        stage = stage if loaded.protocol.stage(stage) is not None else None
        previous = rig.session_id

        def work(job: Job) -> tuple[int, str | None]:
            def start(conn: sqlite3.Connection) -> tuple[int, str | None]:
                if previous is not None:
                    _end_session(conn, previous)
                if not store_v2():
                    return db.start_session(conn, rig.source_id, record.animal, record.rig, loaded.protocol.name,
                                            loaded.protocol.version, loaded.text), None
                from monitor.store import records

                protocol_id = records.ensure_protocol(conn, loaded.protocol.name, loaded.protocol.version,
                                                      loaded.text)
                return records.check_in(conn, animal=record.animal, rig=record.rig, operator=record.operator,
                                        protocol_id=protocol_id, weight_before_g=record.weight_g, stage=stage,
                                        source_id=rig.source_id)
            return self.writer.call(start)

        def done(result: tuple[int, str | None]) -> None:
            session_id, warning = result
            if warning and self.window is not None:
                self.window.statusBar().showMessage(f"Checked in. Note: {warning}", 15000)
            if rig.session_id is not None:
                self.engine.close_session(record.rig, rig.session_id)
            self.engine.open_session(SessionPlan(record.rig, session_id, record.animal, loaded.protocol, stage,
                                                 rig.spec.valve_ul_per_ms, started=time.monotonic(),
                                                 carried=carried))
            if carried:     # the parameters in force are part of the session's record too (stored first)
                self.writer.submit(Batch(list(carried), time.time()), source_id=rig.source_id,
                                   session_id=session_id, live=True)
            rig.fanout.session_id = session_id                 # after the engine knows the session
            rig.session_id, rig.animal = session_id, record.animal
            self.protocols.setdefault(record.animal, loaded)     # its history is read with this protocol
            if stage is not None:
                self.stored_stages[record.animal] = stage
            self._refresh_roster()
            self.load_history(record.animal)

        self.run_job(f"checking in {record.animal}", work, done)

    def check_out(self, request: CheckOut | str) -> None:
        """End the session in a box (`request`: the confirmed CheckOut, or a box's name: the Operator field's
        name is recorded then)."""
        rig_name, operator = (request.rig, request.operator) if isinstance(request, CheckOut) else \
            (request, self._operator())
        rig = self.rigs.get(rig_name)
        if rig is None or rig.session_id is None:
            return
        session_id, animal = rig.session_id, rig.animal
        self.engine.close_session(rig_name, session_id)
        if animal:
            self.live_fractions.forget(animal)
            self._followed.pop(animal, None)
        rig.fanout.session_id = rig.idle_session_id
        rig.session_id, rig.animal = None, None
        self._refresh_roster()

        def done(_: Any) -> None:
            if animal:
                self.load_history(animal, refresh=True)

        self.run_job(f"checking out {animal}",
                     lambda job: self.writer.call(lambda c: _end_session(c, session_id, operator)), done)

    def give_unattended(self, gift: UnattendedGift) -> None:
        """Give a box's presses from while nobody was checked in to an animal (logged): the run is closed, a
        fresh run of no animal takes the box's data from now, and the closed run's trials are derived."""
        rig = self.rigs.get(gift.rig)
        if rig is None or rig.idle_session_id is None:
            return
        if not store_v2():
            self._say("Not given: this store keeps no records of that kind.")
            return
        old = rig.idle_session_id
        loaded = self.protocols.get(gift.animal, rig.protocol)
        stated = _stated_stage(rig)
        stage = stated if stated is not None and loaded.protocol.stage(stated) is not None else \
            self.roster().default_stage(gift.animal, gift.rig) or None

        def fresh(job: Job) -> int:
            return self.writer.call(lambda c: db.start_session(c, rig.source_id, NO_ANIMAL, gift.rig, None, None,
                                                               None))

        def switched(new: int) -> None:
            rig.idle_session_id = new
            if rig.session_id is None:
                rig.fanout.session_id = new          # from here on the box's data go to the fresh run
            self.engine.forget_unattended(gift.rig)
            self.run_job(f"giving {gift.rig}'s trials to {gift.animal}", lambda job: self.writer.call(give), given)

        def give(conn: sqlite3.Connection) -> int:
            from monitor.store import records, session_changes

            db.end_session(conn, old)
            protocol_id = records.ensure_protocol(conn, loaded.protocol.name, loaded.protocol.version, loaded.text)
            return session_changes.give_run(conn, old, animal=gift.animal, operator=gift.operator,
                                            reason=gift.reason, protocol_id=protocol_id, stage=stage)

        def given(trials: int) -> None:
            self.protocols.setdefault(gift.animal, loaded)
            self._say(f"{trials} trials from {gift.rig} given to {gift.animal} (logged).")
            self.load_history(gift.animal, refresh=True)
            self._refresh_roster()

        self.run_job(f"closing {gift.rig}'s run", fresh, switched)

    def _say(self, message: str) -> None:
        if self.window is not None:
            self.window.statusBar().showMessage(message, 15000)

    def _refresh_roster(self) -> None:
        if self.window is not None:
            self.window.set_roster(self.roster())

    # --- exclusions and conditions (store v2) ---------------------------------------------------------
    def _stored_session(self, animal: str, index: int) -> int | None:
        parts = self.history_parts.get(animal)
        if parts is None or not 1 <= index <= len(parts.session_ids):
            return None
        return parts.session_ids[index - 1]

    def _operator(self) -> str:
        return self.window.alert_panel.operator.text().strip() if self.window is not None else ""

    def _record(self, what: str, animal: str, index: int, fn: Callable[[sqlite3.Connection, int, str], Any]) -> None:
        session_id, operator = self._stored_session(animal, index), self._operator()
        if not store_v2() or session_id is None or not operator:
            why = ("this store has no records of that kind" if not store_v2() else
                   "session not found in the store" if session_id is None else
                   "type your name in the Operator field first")
            if self.window is not None:
                self.window.statusBar().showMessage(f"{what} not saved: {why}.", 15000)
            return
        self.run_job(f"{what} for {animal}", lambda job: self.writer.call(lambda c: fn(c, session_id, operator)),
                     lambda _: self.load_history(animal, refresh=True))

    def exclude(self, record: Exclusion) -> None:
        """Flag a session excluded with its reason (kept, left out of curves and fits), or count it again;
        either is logged."""
        from monitor.store.session_changes import set_excluded

        self._record("exclusion" if record.excluded else "undoing the exclusion", record.animal, record.session,
                     lambda c, sid, who: set_excluded(c, sid, record.excluded, reason=record.reason, operator=who))

    def add_condition(self, record: ConditionRecord) -> None:
        from monitor.store import records as store_records

        at = datetime.now().astimezone().isoformat(timespec="seconds")
        self._record("condition", record.animal, record.session, lambda c, sid, who: store_records.add_condition(
            c, sid, what=record.what, operator=who, at=at, dose=record.dose or None, volume_ul=record.volume_ul,
            sham=record.sham, notes=record.note or None))

    # --- history ------------------------------------------------------------------------------------
    def load_history(self, animal: str, refresh: bool = False) -> None:
        """Load (or reload) an animal's history and its consolidation fit, off the GUI thread.

        The fit shown is the one cached in the store; when there is none, or the data changed since
        (a session ended, a session was excluded), the model is refitted in a separate process
        (monitor.store.consolidation_fits), which caches the new fit, and the page is updated again.
        """
        if animal in self._loading:
            if refresh:                      # the data changed under a load in progress: load again after it
                self._reload.add(animal)
            return
        if animal in self.history_parts and not refresh:
            return
        loaded = self._protocol_of(animal)
        if loaded is None:
            return
        protocol = loaded.protocol

        def work(job: Job):
            with self._heavy_turn(job, animal):
                sessions = self.history.sessions(animal, protocol, job)
                cached = self._cached_fit(animal)
                parts = views.history_parts(protocol, sessions, cached)
            self._post(lambda: self._history_ready(animal, parts))
            if not self.fit_consolidation or cached is None or cached["current"]:
                return parts, cached
            from monitor.store.consolidation_fits import refit_in_process

            with self._fit_turn(job):
                block = refit_in_process(
                    self.writer.path, [animal], cancel=job.cancelled,
                    progress=lambda _a, f, m: job.progress(f, f"consolidation model: {m}"))[animal]
            if block is None:
                if job.cancelled():
                    raise Cancelled()
                raise RuntimeError("the consolidation fit ended without a result")
            block = self._cached_fit(animal) or block     # as saved, with the filter for this session's trials
            return views.history_parts(protocol, sessions, block), block

        def over() -> None:
            self._loading.pop(animal, None)
            if animal in self._reload:
                self._reload.discard(animal)
                self.load_history(animal, refresh=True)

        def done(result) -> None:
            parts, block = result
            if (block or {}).get("live") != (self.fits.get(animal) or {}).get("live"):
                self.live_fractions.forget(animal)        # a new fit: follow the session from it
            self.fits[animal] = block
            self._history_ready(animal, parts)
            over()

        self._loading[animal] = self.run_job(f"history of {animal}", work, done, failed=over)

    def _cached_fit(self, animal: str) -> dict[str, Any] | None:
        """The store's newest consolidation block of `animal`, with "current" (None: a store without fits)."""
        if not store_v2():
            return None
        from monitor.store.fits import cached_block, latest_fit

        conn = db.open_store(self.writer.path, readonly=True)
        try:
            fit = latest_fit(conn, animal)
            return {**cached_block(conn, animal, None), "live": fit["params"].get("live") if fit else None}
        finally:
            conn.close()

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

    def _protocol_of(self, animal: str) -> LoadedProtocol | None:
        if animal in self.protocols:
            return self.protocols[animal]
        for rig in self.rigs.values():
            if rig.animal == animal:
                return rig.protocol
        return None

    def _history_ready(self, animal: str, parts: views.HistoryParts) -> None:
        self.history_parts[animal] = parts
        alert = plateau_alert(self._plateau.get(animal), parts.plateau_reached, parts.plateau_session,
                              parts.plateau_reason)
        self._plateau[animal] = parts.plateau_reached
        if alert is not None:
            rig = next((n for n, r in self.rigs.items() if r.animal == animal), "")
            self.alerts.push(RaisedAlert(rig, animal, alert, time.time()))
        self._refresh_roster()
        self._push_page(animal)
        if self.records is not None:
            self.records.update([animal])

    # --- pages ------------------------------------------------------------------------------------------
    def page_opened(self, animal: str) -> None:
        self.open_pages.add(animal)
        self.load_history(animal)
        self._push_page(animal)

    def page_closed(self, animal: str) -> None:
        self.open_pages.discard(animal)

    def _push_page(self, animal: str) -> None:
        if animal not in self.open_pages:
            return
        rig = next((r for r in self.rigs.values() if r.animal == animal), None)
        loaded = self._protocol_of(animal)
        today = None
        if rig is not None and rig.snapshot is not None and rig.snapshot.animal == animal:
            version, cached = self._today.get(animal, (-1, None))
            if version != rig.snapshot.version:
                parts = self.history_parts.get(animal)
                cached = views.today_state(rig.snapshot, parts.previous_intervals if parts else None,
                                           time.monotonic())
                self._today[animal] = (rig.snapshot.version, cached)
            today = cached
        care, eligibility = self.records.texts(animal) if self.records is not None else ("", "")
        parts = self.history_parts.get(animal)
        panel = self._live_panel(animal, rig, loaded) or (parts.consolidation if parts else None)
        self.book.update(views.page_state(animal, rig.spec.name if rig else None,
                                          loaded.protocol.name if loaded else "", today,
                                          parts, care, eligibility, self._measured(animal, panel)))

    def _measured(self, animal: str, panel):
        """The panel with the eligibility's own figures as its measures (the same session, the same definition
        as the eligibility line), once the animal is judged; the same object until either changes."""
        figures = self.records.figures.get(animal) if self.records is not None else None
        if panel is None or figures is None:
            return panel
        before = self._measured_panels.get(animal)
        if before is not None and before[0] is panel and before[1] is figures:
            return before[2]
        out = replace(panel, trials_since_plateau=figures.trials_since_plateau,
                      sessions_since_plateau=figures.sessions_since_plateau,
                      interval_error=figures.measures.get("interval_error"), cv=figures.measures.get("cv"),
                      measures_session=figures.session)
        self._measured_panels[animal] = (panel, figures, out)
        return out

    def _follow(self, animal: str, rig: _Rig) -> None:
        """Feed the session's new trials to the animal's cached filter (every rig, page open or not)."""
        snapshot, block, loaded = rig.snapshot, self.fits.get(animal) or {}, self._protocol_of(animal)
        if snapshot is None or snapshot.session_id is None or snapshot.animal != animal or not block.get("live") \
                or loaded is None:
            return
        self._followed[animal] = self.live_fractions.update(
            animal, snapshot.session_id, snapshot.live, block["live"], loaded.protocol.final_stage.name,
            session_start_wall(snapshot.started))

    def _live_panel(self, animal: str, rig: _Rig | None, loaded: LoadedProtocol | None):
        """The consolidation panel with this session's figure (the same object until a trial is followed)."""
        parts, block = self.history_parts.get(animal), self.fits.get(animal) or {}
        followed = self._followed.get(animal) if rig is not None and rig.animal == animal else None
        if parts is None or followed is None:
            return None
        before = self._live_panels.get(animal)
        if before is not None and before[0] is parts.consolidation and before[1] is followed[0]:
            return before[2]
        panel = replace(parts.consolidation, live_text=live_text(*followed, block.get("session")))
        self._live_panels[animal] = (parts.consolidation, followed[0], panel)
        return panel

    # --- the timer ---------------------------------------------------------------------------------------
    def refresh(self) -> None:
        """One tick on the GUI thread: inbox, snapshots, alerts, tiles, pages, status bar."""
        started = time.perf_counter()
        while True:
            try:
                self._inbox.get_nowait()()
            except queue.Empty:
                break
        fresh = self.engine.take_snapshots()
        for name, snap in fresh.items():
            if name in self.rigs:
                self.rigs[name].snapshot = snap
        for raised in self.engine.take_alerts():
            self.alerts.push(raised)
        wstatus = self.writer.status()
        failing = wstatus.state in ("failed", "overflow")
        alert = store_alert(self._store_failing, failing, wstatus.text)
        self._store_failing = failing
        if alert is not None:
            self.alerts.push(RaisedAlert("", None, alert, time.time()))
        now = time.monotonic()
        statuses = {}
        for name, rig in self.rigs.items():
            status = rig.source.status()
            statuses[name] = status
            count, worst = self.alerts.summary(name)
            tile = views.tile_state(name, rig.snapshot, status, now=now, source_text=rig.spec.path,
                                    alert_count=count, alert_severity=worst)
            if self.board.update(tile) and name in fresh:
                self.painted.append((name, fresh[name].newest_stamp))
            if rig.animal and name in fresh:
                self._follow(rig.animal, rig)
                self._push_page(rig.animal)
        bar = views.status_state(statuses, wstatus.state, wstatus.text, wstatus.committed_events)
        if self.window is not None and bar != self._status_shown:
            self._status_shown = bar
            self.window.set_status(bar)
        self.refresh_seconds.append(time.perf_counter() - started)
        del self.refresh_seconds[:-1000]
        del self.painted[:-10000]

    # --- worker jobs -----------------------------------------------------------------------------------
    def _post(self, fn: Callable[[], None]) -> None:
        """Run `fn` on the GUI thread at the next tick (any thread)."""
        self._inbox.put(fn)

    def run_job(self, title: str, work: Callable[[Job], Any], done: Callable[[Any], None],
                failed: Callable[[], None] | None = None) -> Job:
        """Run `work(job)` in a worker thread; `done(result)` then runs on the GUI thread."""
        job = Job(title, self._post, self._show_progress)
        self._jobs.append(job)

        def run() -> None:
            try:
                result = work(job)
            except Cancelled:
                self._post(lambda: self._job_over(job, f"{title}: cancelled", failed))
                return
            except Exception as exc:  # noqa: BLE001 - shown in the status bar, never swallowed
                message = f"{title} failed: {type(exc).__name__}: {exc}"
                self._post(lambda: self._job_over(job, message, failed))
                return
            self._post(lambda: (self._job_over(job, "", None), done(result)))

        threading.Thread(target=run, name=title, daemon=True).start()
        return job

    def _job_over(self, job: Job, message: str, failed: Callable[[], None] | None) -> None:
        if job in self._jobs:
            self._jobs.remove(job)
        if failed is not None:
            failed()
        if self.window is not None:
            if message:
                self.window.statusBar().showMessage(message, 10000)
            if not self._jobs and self.progress_bar is not None:
                for widget in (self.progress_label, self.progress_bar, self.cancel_button):
                    widget.hide()

    def _show_progress(self, title: str, fraction: float, message: str) -> None:
        if self.progress_bar is None or not any(j.title == title for j in self._jobs):
            return
        self.progress_bar.setValue(int(round(100 * min(max(fraction, 0.0), 1.0))))
        self.progress_label.setText(title)
        self.progress_label.setToolTip(message)
        for widget in (self.progress_label, self.progress_bar, self.cancel_button):
            widget.show()

    def cancel_jobs(self) -> None:
        for job in self._jobs:
            job.cancel_event.set()

    def jobs(self) -> list[str]:
        return [j.title for j in self._jobs]


def wait_for(condition: Callable[[], bool], timeout: float, app: QApplication | None = None) -> bool:
    """Process Qt events until `condition()` holds or `timeout` seconds pass."""
    deadline = time.monotonic() + timeout
    app = app or QApplication.instance()
    while not condition():
        if time.monotonic() > deadline:
            return False
        app.processEvents()
        time.sleep(0.01)
    return True

