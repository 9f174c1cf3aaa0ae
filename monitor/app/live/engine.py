"""The live engine: per rig, events in from the readers, immutable snapshots out to the screen.

Rule: one engine thread serves every rig. Reader threads hand batches to the
Fanout, which puts them on `Engine.queue` without waiting (a full queue costs
the display a batch, never the store). The engine thread wakes once every
`publish_s` (not once per batch: fewer turns of the GIL taken from the GUI
thread), takes every queued batch, feeds each event to the rig's `LiveSession`
(O(1) per event; it keeps the rolling hit rate after each completed trial in
append-only arrays, `LiveStats.rate_series`) and to its alert rules, and
publishes one immutable `RigSnapshot` per rig that changed into a latest-value slot. The GUI thread's
timer calls `take_snapshots()` and `take_alerts()`; neither ever waits for the
engine beyond a short lock, and the engine never touches Qt. Sessions are
opened and closed by control messages (`open_session`, `close_session`) that
are applied before any batch of that session; a batch of no known session (no
animal checked in) still counts as activity, and its presses are counted as
unattended (an alert once there are a few; reset when a run is given away).
Each rig keeps the newest `param` event of each name whatever the session (a
new header or `param stage` starts afresh); a session opens with
those fed first (`SessionPlan.carried`), so a window the box sent before
check-in is in force. A disagreement with the rig is alerted only while the
window in force is known (the rig's own, or a fixed stage's). Alert rules that
depend on time and on the source's link are checked every `check_s`. Once
told the animal's cached fit (`follow`), the engine also feeds every trial
the session completes to that fit's filter as it completes (monitor.app.live
.fraction), the session's trials so far first, and the snapshot carries the
slow-state fraction after the latest one: no trial is missed however fast
they come.
"""

from __future__ import annotations

import collections
import queue
import threading
import time
from typing import Any, Callable, NamedTuple

from drivers.status import LOST, STOPPED, WAITING, SourceStatus
from drivers.wire import Event, Header, Malformed
from monitor.app.live.fraction import FractionFollower
from monitor.app.live.pipeline import EngineBatch
from monitor.core.alerts import ACTIVITY_EVENTS, LINK_DOWN, LINK_ENDED, LINK_UP, AlertRules, Raised, RigWatch
from monitor.core.consolidation.live import LiveFraction
from monitor.core.protocol import TrainingProtocol
from monitor.core.session.live_stats import DEFAULT_WINDOW, LiveSession, LiveSnapshot, RateSeries

QUEUE_SIZE = 50_000   # batches; at 16 rigs this is minutes of backlog
PUBLISH_S = 0.02      # snapshots at most 50 times a second per rig (the screen polls at ~20 Hz)
CHECK_S = 0.25        # time-driven alert rules and source links


class SessionPlan(NamedTuple):
    """What the engine needs to follow one session of one rig."""

    rig: str
    session_id: int
    animal: str
    protocol: TrainingProtocol
    stage: str | None = None
    valve_ul_per_ms: float | None = None
    previous_intervals: dict[str, tuple[float, ...]] | None = None
    started: float = 0.0  # host monotonic seconds
    carried: tuple[Event, ...] = ()  # the rig's `param` events in force from before the session, fed first


class RigSnapshot(NamedTuple):
    """One rig at one moment, as the screen may show it (immutable)."""

    rig: str
    version: int
    session_id: int | None
    animal: str | None
    started: float | None         # host monotonic start of the session
    ended: bool                   # the session was closed (checked out)
    live: LiveSnapshot | None
    series: RateSeries | None
    disagreements: int
    events: int                   # events the engine saw for this rig since start
    malformed: int
    last_event_at: float | None   # host monotonic
    newest_stamp: float           # reader stamp of the newest batch included (0: none)
    params: tuple[Event, ...] = ()   # the rig's newest `param` event of each name (any session or none)
    window_known: bool = False    # the window in force is the rig's own or a fixed stage's (not a guess)
    unattended_events: int = 0    # presses, pushes, trial starts since the last session ended with nobody in
    fraction: LiveFraction | None = None   # the slow-state fraction after the session's latest trial (followed)


class RaisedAlert(NamedTuple):
    """An alert from a rig's rules, with whose it is and when (host wall seconds)."""

    rig: str
    animal: str | None
    alert: Raised
    wall: float


class _Session:
    def __init__(self, plan: SessionPlan, window: int) -> None:
        self.plan = plan
        self.live = LiveSession(plan.protocol, plan.stage, window=window, valve_ul_per_ms=plan.valve_ul_per_ms,
                                previous_intervals=dict(plan.previous_intervals or {}))
        self.ended = False
        self.follower: FractionFollower | None = None
        for event in plan.carried:
            self.live.feed(event)

    def feed(self, event: Event) -> None:
        """One event into the session; its completed trials into the followed fit too."""
        new = self.live.feed(event)
        if new and self.follower is not None:
            self.follower.add(new)

    def follow(self, cached: dict, final_stage: str, start_wall: float) -> None:
        """Follow the slow-state fraction from a cached fit, from the session's first trial on."""
        self.follower = FractionFollower(cached, final_stage, start_wall)
        self.follower.add(self.live.trials)

    def window_known(self) -> bool:
        """The rig sent its window, or the stage in force has a fixed window in the protocol (rigside's
        window is then not a guess, so a disagreement with the rig means something)."""
        builder = self.live.builder
        if builder.window_from_rig:
            return True
        stage = self.plan.protocol.stage(builder.stage)
        return stage is not None and stage.adaptive is None


class _Rig:
    def __init__(self, rig: str, status: Callable[[], SourceStatus] | None, rules: AlertRules) -> None:
        self.rig = rig
        self.status = status
        self.watch = RigWatch(rules)
        self.session: _Session | None = None
        self.version = 0
        self.events = self.malformed = 0
        self.last_event_at: float | None = None
        self.newest_stamp = 0.0
        self.dirty = True
        self.params: dict[str, Event] = {}
        self.unattended = 0

    def remember(self, record: Event | Header) -> None:
        """Keep the newest `param` of each name (a stage change or a board's new header starts afresh)."""
        if isinstance(record, Header):
            self.params.clear()
        elif record.name == "param" and len(record.args) >= 2:
            if record.args[0] == "stage":
                self.params.clear()
            self.params.pop(record.args[0], None)
            self.params[record.args[0]] = record


def link_of(status: SourceStatus) -> str | None:
    """The alert rules' view of a source's state (None: stopped on purpose, no change)."""
    if status.state == LOST:
        return LINK_ENDED
    if status.state == WAITING and status.gap_since is not None:
        return LINK_DOWN
    if status.state == STOPPED:
        return None
    return LINK_UP


class Engine:
    """Events of every rig in, snapshots and alerts out; call `start()` or drive `step()` in tests."""

    def __init__(self, *, rules: AlertRules = AlertRules(), window: int = DEFAULT_WINDOW,
                 queue_size: int = QUEUE_SIZE, publish_s: float = PUBLISH_S, check_s: float = CHECK_S,
                 clock: Callable[[], float] = time.monotonic, wall: Callable[[], float] = time.time) -> None:
        self.queue: queue.Queue[EngineBatch] = queue.Queue(maxsize=queue_size)
        self.rules = rules
        self.window = window
        self.publish_s = publish_s
        self.check_s = check_s
        self._clock, self._wall = clock, wall
        self._controls: collections.deque[tuple[str, Any]] = collections.deque()
        self._rigs: dict[str, _Rig] = {}
        self._by_source: dict[int, _Rig] = {}
        self._by_session: dict[int, _Rig] = {}
        self._lock = threading.Lock()
        self._latest: dict[str, RigSnapshot] = {}
        self._alerts: list[RaisedAlert] = []
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None
        self._last_publish = self._last_check = 0.0
        self._behind = False      # the last step left batches queued
        self.batches = 0
        self.error: str | None = None

    # --- control (any thread) ---------------------------------------------------------
    def add_rig(self, rig: str, source_id: int | None, status: Callable[[], SourceStatus] | None = None) -> None:
        self._controls.append(("rig", (rig, source_id, status)))

    def open_session(self, plan: SessionPlan) -> None:
        """Follow `plan.session_id` from now; call before the Fanout switches to that session."""
        self._controls.append(("open", plan))

    def forget_unattended(self, rig: str) -> None:
        """The rig's unattended run was given away (or ended): count afresh."""
        self._controls.append(("unattended", rig))

    def close_session(self, rig: str, session_id: int) -> None:
        self._controls.append(("close", (rig, session_id)))

    def follow(self, rig: str, session_id: int, cached: dict, final_stage: str) -> None:
        """Follow the session's slow-state fraction from the animal's cached fit (its "live" filter state)."""
        self._controls.append(("follow", (rig, session_id, cached, final_stage)))

    def start(self) -> Engine:
        self._thread = threading.Thread(target=self._run, name="engine", daemon=True)
        self._thread.start()
        return self

    def stop(self, timeout: float = 2.0) -> None:
        self._stop.set()
        if self._thread is not None:
            self._thread.join(timeout)

    # --- output (GUI thread) -------------------------------------------------------------
    def take_snapshots(self) -> dict[str, RigSnapshot]:
        """The newest snapshot of each rig that changed since the last call."""
        with self._lock:
            out, self._latest = self._latest, {}
        return out

    def take_alerts(self) -> list[RaisedAlert]:
        with self._lock:
            out, self._alerts = self._alerts, []
        return out

    # --- the engine thread -----------------------------------------------------------------
    def _run(self) -> None:
        try:
            while not self._stop.is_set():
                self.step(0.05)
            self.step(0.0)
        except Exception as exc:  # noqa: BLE001 - shown, never swallowed
            self.error = f"{type(exc).__name__}: {exc}"
            raise

    def step(self, timeout: float) -> None:
        """Wait up to `timeout` for the next publish slot, apply controls, process what is queued, publish,
        check rules.

        The engine sleeps between slots and then takes every queued batch in one go, rather than waking for
        each batch: one wake-up (and one turn of the GIL) per slot instead of one per reader batch, which
        leaves the GUI thread its share; snapshots are published at the same cadence as before.
        """
        wait = min(max(timeout, 0.0), self._last_publish + self.publish_s - self._clock())
        if wait > 0 and not self._behind:
            self._stop.wait(wait)
        self._apply_controls()
        self._behind = False
        while True:
            try:
                item = self.queue.get_nowait()
            except queue.Empty:
                break
            self._batch(item)
            if self._clock() - self._last_publish >= 2 * self.publish_s:
                self._behind = True     # a backlog: publish what is done, go on without sleeping
                break
        now = self._clock()
        if now - self._last_check >= self.check_s:
            self._last_check = now
            self._check(now)
        if now - self._last_publish >= self.publish_s:
            self._publish(now)

    def _apply_controls(self) -> None:
        while self._controls:
            kind, value = self._controls.popleft()
            if kind == "rig":
                rig, source_id, status = value
                state = self._rigs.setdefault(rig, _Rig(rig, status, self.rules))
                state.status = status or state.status
                if source_id is not None:
                    self._by_source[source_id] = state
            elif kind == "open":
                plan: SessionPlan = value
                state = self._rigs.setdefault(plan.rig, _Rig(plan.rig, None, self.rules))
                self._end(state)
                state.session = _Session(plan, self.window)
                state.unattended = 0
                self._by_session[plan.session_id] = state
                state.watch.session(True, self._clock())
                state.dirty = True
            elif kind == "unattended":
                state = self._rigs.get(value)
                if state is not None:
                    state.unattended = 0
                    state.watch.forget_unattended()
                    state.dirty = True
            elif kind == "close":
                rig, session_id = value
                state = self._rigs.get(rig)
                if state is not None and state.session is not None and state.session.plan.session_id == session_id:
                    self._end(state)
            elif kind == "follow":
                rig, session_id, cached, final_stage = value
                state = self._rigs.get(rig)
                session = state.session if state is not None else None
                if session is not None and session.plan.session_id == session_id and not session.ended:
                    start_wall = self._wall() - (self._clock() - session.plan.started)
                    session.follow(cached, final_stage, start_wall)
                    state.dirty = True

    def _end(self, state: _Rig) -> None:
        session = state.session
        if session is None or session.ended:
            return
        flushed = session.live.finish()
        if session.follower is not None:
            session.follower.add(flushed)
        session.ended = True
        state.unattended = 0
        state.watch.session(False, self._clock())
        self._by_session.pop(session.plan.session_id, None)
        state.dirty = True

    def _batch(self, item: EngineBatch) -> None:
        self.batches += 1
        state = self._by_session.get(item.session_id)
        if state is None and self._controls:
            self._apply_controls()
            state = self._by_session.get(item.session_id)
        session = state.session if state is not None else None
        if state is None:
            state = self._by_source.get(item.source_id)
            if state is None:
                return
        now = self._clock()
        watch = state.watch
        raised: list[Raised] = []
        events = 0
        watch.data(now)
        for record in item.batch.records:
            if isinstance(record, Event):
                events += 1
                state.remember(record)
                if (session is None or session.ended) and record.name in ACTIVITY_EVENTS:
                    state.unattended += 1
                raised += watch.event(record.name, record.args, record.t_us, now)
                if session is not None:
                    session.feed(record)
            elif isinstance(record, Header):
                state.remember(record)
            elif isinstance(record, Malformed):
                state.malformed += 1
        if session is None or session.ended:
            raised += watch.unattended(state.unattended)
        if item.batch.records:
            raised += watch.malformed(state.malformed, now)
        if session is not None and session.window_known():
            found = session.live.builder.disagreements
            if found:
                _, rig_word, computed = found[-1]
                raised += watch.disagreements(len(found), f"rig said {rig_word}, rigside computed {computed}", now)
        if events:
            state.events += events
            state.last_event_at = now
        state.newest_stamp = max(state.newest_stamp, item.stamped)
        state.dirty = True
        self._raise(state, raised)

    def _check(self, now: float) -> None:
        for state in self._rigs.values():
            raised: list[Raised] = []
            if state.status is not None:
                link = link_of(state.status())
                if link is not None:
                    raised += state.watch.link(link, now)
            raised += state.watch.tick(now)
            self._raise(state, raised)

    def _raise(self, state: _Rig, raised: list[Raised]) -> None:
        if not raised:
            return
        animal = state.session.plan.animal if state.session is not None and not state.session.ended else None
        wall = self._wall()
        with self._lock:
            self._alerts.extend(RaisedAlert(state.rig, animal, r, wall) for r in raised)

    def _publish(self, now: float) -> None:
        self._last_publish = now
        fresh = {}
        for state in self._rigs.values():
            if not state.dirty:
                continue
            state.dirty = False
            state.version += 1
            session = state.session
            fresh[state.rig] = RigSnapshot(
                rig=state.rig, version=state.version,
                session_id=session.plan.session_id if session else None,
                animal=session.plan.animal if session else None,
                started=session.plan.started if session else None,
                ended=session.ended if session else False,
                live=session.live.snapshot() if session else None,
                series=session.live.stats.rate_series() if session else None,
                disagreements=len(session.live.builder.disagreements) if session else 0,
                events=state.events, malformed=state.malformed, last_event_at=state.last_event_at,
                newest_stamp=state.newest_stamp, params=tuple(state.params.values()),
                window_known=session.window_known() if session else False, unattended_events=state.unattended,
                fraction=session.follower.fraction if session and session.follower else None)
        if fresh:
            with self._lock:
                self._latest.update(fresh)
