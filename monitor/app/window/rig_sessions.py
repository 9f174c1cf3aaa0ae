"""The window's rigs: building each rig and its source, check-in, check-out, unattended runs, the roster.

Rule: each rig is one source (serial or file) whose reader thread calls its
`Fanout`. Registering a rig (its source row, idle run and resume point) and
every session change run in a worker job through the store writer
(monitor.store.rig_sessions); the engine and the Fanout are switched on the
GUI thread when the store has answered: check-in opens the engine's session
first, then points the Fanout at it; check-out switches the Fanout back to
the rig's run of no animal before the store ends the session. The stage of a
new session is the one the box itself last sent, when the protocol knows it.
"""

from __future__ import annotations

import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

from drivers.status import Batch
from monitor.app.live.engine import RigSnapshot, SessionPlan
from monitor.app.live.pipeline import Fanout
from monitor.app.rigs import LoadedProtocol, RigSpec, decoder_factory, load_protocol
from monitor.store import rig_sessions as store
from monitor.ui.models import CheckIn, CheckOut, Roster, RigSetup, UnattendedGift


class Rig:
    """One rig as the window runs it: spec, protocol, source, fan-out, its sessions and latest snapshot."""

    def __init__(self, spec: RigSpec, protocol: LoadedProtocol, source: Any, fanout: Fanout,
                 registered: store.RegisteredRig) -> None:
        self.spec, self.protocol, self.source, self.fanout = spec, protocol, source, fanout
        self.source_id = registered.source_id
        self.session_id: int | None = None          # the checked-in session
        self.idle_session_id: int | None = registered.idle_session_id
        self.animal: str | None = None
        self.snapshot: RigSnapshot | None = None

    def stated_stage(self) -> str | None:
        """The stage the box itself last sent (`param stage`), before or during a session; None if it never did."""
        params = self.snapshot.params if self.snapshot is not None else ()
        return next((e.args[1] for e in reversed(params) if e.args[0] == "stage"), None)

    def stage_for(self, loaded: LoadedProtocol, chosen: str | None) -> str | None:
        """The box's own stage when the protocol knows it, else `chosen` when the protocol knows that."""
        stated = self.stated_stage()
        stage = stated if stated is not None and loaded.protocol.stage(stated) is not None else chosen
        return stage if stage is not None and loaded.protocol.stage(stage) is not None else None


def _text(loaded: LoadedProtocol) -> store.ProtocolText:
    return store.ProtocolText(loaded.protocol.name, loaded.protocol.version, loaded.text)


class RigSessions:
    """The rigs of the window and their sessions; GUI thread (store work in jobs)."""

    def __init__(self, controller) -> None:
        self.c = controller
        self.rigs: dict[str, Rig] = {}
        self.stored_stages: dict[str, str] = {}   # animal -> stage of its latest stored session

    # --- rigs -----------------------------------------------------------------------------
    def add_rig(self, spec: RigSpec, start: bool = True,
                source_factory: Callable[[Fanout], Any] | None = None) -> None:
        """Register a rig and start its source now (blocks on the store: for start-up).

        `source_factory(fanout)` replaces the serial or file source (benchmarks, simulators): the
        object it returns needs `start()`, `stop()` and `status() -> SourceStatus`.
        """
        self._start_rig(self._register(spec), start, source_factory)

    def start_source(self, name: str) -> None:
        """Start the reader of a rig added with `start=False` (e.g. once its animal is checked in)."""
        if not self.c.closed:
            self.rigs[name].source.start()

    def _register(self, spec: RigSpec) -> tuple[RigSpec, LoadedProtocol, store.RegisteredRig]:
        """The store side of adding a rig (any thread): one recorder per source, its rows, its resume point."""
        from monitor.store.source_locks import resource_key

        protocol = load_protocol(spec.protocol_path)
        key = str(Path(spec.path).resolve()) if spec.kind == "file" else spec.path
        self.c.writer.hold_source(resource_key(spec.kind, spec.path), "the rigside window")
        registered = self.c.writer.call(lambda c: store.register_rig(
            c, name=spec.name, kind=spec.kind, key=key, usb_serial=spec.usb_serial,
            mapping=str(spec.mapping_path) if spec.mapping_path else None, valve_ul_per_ms=spec.valve_ul_per_ms,
            decoder_factory=decoder_factory(spec.mapping_path)))
        return spec, protocol, registered

    def _start_rig(self, registered: tuple[RigSpec, LoadedProtocol, store.RegisteredRig], start: bool = True,
                   source_factory: Callable[[Fanout], Any] | None = None) -> None:
        spec, protocol, rows = registered
        fanout = Fanout(self.c.writer, source_id=rows.source_id, session_id=rows.idle_session_id,
                        live=spec.kind == "serial", engine=self.c.engine.queue)
        factory = decoder_factory(spec.mapping_path)
        if source_factory is not None:
            source: Any = source_factory(fanout)
        elif spec.kind == "file":
            from drivers.tail import FileTail

            source = FileTail(spec.path, fanout, decoder_factory=factory, resume=rows.resume,
                              resume_notice=rows.resume_notice,
                              should_pause=lambda: self.c.writer.backlogged)
        else:
            from drivers.serial import SerialSource

            source = SerialSource(spec.path, fanout, usb_serial=spec.usb_serial, decoder=factory(),
                                  wait_for_header=spec.wait_for_header and spec.mapping_path is None)
        self.rigs[spec.name] = Rig(spec, protocol, source, fanout, rows)
        self.c.engine.add_rig(spec.name, rows.source_id, source.status)
        if start:
            source.start()
        self.c.refresh_roster()

    def add_from_setup(self, setup: RigSetup) -> None:
        """A rig from the setup dialog (registered in a worker)."""
        spec = RigSpec(setup.name, setup.source, setup.path, Path(setup.protocol_path), setup.serial_number,
                       Path(setup.mapping_path) if setup.mapping_path else None, setup.valve_ul_per_ms, setup.reset)
        self.c.run_job(f"adding {setup.name}", lambda job: self._register(spec), self._start_rig)

    def rig_of(self, animal: str) -> Rig | None:
        """The rig `animal` is checked into, if any."""
        return next((r for r in self.rigs.values() if r.animal == animal), None)

    # --- roster ---------------------------------------------------------------------------
    def roster(self) -> Roster:
        pages = self.c.pages
        animals = sorted(set(self.c.protocols) | set(self.stored_stages)
                         | {r.animal for r in self.rigs.values() if r.animal} | self.c.recorded_animals)
        loaded = [*(r.protocol for r in self.rigs.values()), *self.c.protocols.values()]
        stages = tuple(dict.fromkeys(s.name for p in loaded for s in p.protocol.stages))   # training order
        usual = {a: tuple(sorted({row.rig for row in parts.sessions if row.rig}))
                 for a, parts in pages.history_parts.items()}
        return Roster(animals=tuple(animals), rigs=tuple(self.rigs), stages=stages, usual_rigs=usual,
                      occupied={n: r.animal for n, r in self.rigs.items() if r.animal}, operators=(),
                      current_stage={**self.stored_stages, **pages.history_stages()},
                      first_stage={n: r.protocol.protocol.stages[0].name for n, r in self.rigs.items()},
                      box_stage={n: s for n, r in self.rigs.items() if (s := r.stated_stage()) is not None})

    def load_stored_stages(self) -> None:
        """Read every animal's latest recorded stage from the store (worker), then refresh the roster."""
        from monitor.app.store_access import read_job
        from monitor.store.roster import latest_stages

        def done(found: dict[str, str]) -> None:
            self.stored_stages = found
            self.c.refresh_roster()

        self.c.run_job("reading the animals' stages", read_job(Path(self.c.writer.path), latest_stages), done)

    # --- check-in, check-out --------------------------------------------------------------
    def check_in(self, record: CheckIn) -> None:
        """Start a session of `record.animal` in `record.rig` (the store call runs in a worker)."""
        rig = self.rigs[record.rig]
        loaded = self.c.protocols.get(record.animal, rig.protocol)
        carried = rig.snapshot.params if rig.snapshot is not None else ()
        stage = rig.stage_for(loaded, record.stage)            # the box is the witness of its own stage
        previous = rig.session_id

        def work(job) -> tuple[int, str | None]:
            return self.c.writer.call(lambda c: store.check_in(
                c, previous=previous, animal=record.animal, rig=record.rig, operator=record.operator,
                protocol=_text(loaded), weight_g=record.weight_g, stage=stage, source_id=rig.source_id))

        def done(result: tuple[int, str | None]) -> None:
            session_id, warning = result
            if warning:
                self.c.say(f"Checked in. Note: {warning}")
            if rig.session_id is not None:
                self.c.engine.close_session(record.rig, rig.session_id)
            self.c.engine.open_session(SessionPlan(record.rig, session_id, record.animal, loaded.protocol, stage,
                                                   rig.spec.valve_ul_per_ms, started=time.monotonic(),
                                                   carried=carried))
            if carried:     # the parameters in force are part of the session's record too (stored first)
                self.c.writer.submit(Batch(list(carried), time.time()), source_id=rig.source_id,
                                     session_id=session_id, live=True)
            rig.fanout.session_id = session_id                 # after the engine knows the session
            rig.session_id, rig.animal = session_id, record.animal
            self.c.protocols.setdefault(record.animal, loaded)     # its history is read with this protocol
            if stage is not None:
                self.stored_stages[record.animal] = stage
            self.c.refresh_roster()
            self.c.pages.session_started(record.animal)

        self.c.run_job(f"checking in {record.animal}", work, done)

    def check_out(self, request: CheckOut | str) -> None:
        """End the session in a box (`request`: the confirmed CheckOut, or a box's name: the Operator field's
        name is recorded then)."""
        rig_name, operator = (request.rig, request.operator) if isinstance(request, CheckOut) else \
            (request, self.c.operator())
        rig = self.rigs.get(rig_name)
        if rig is None or rig.session_id is None:
            return
        session_id, animal = rig.session_id, rig.animal
        self.c.engine.close_session(rig_name, session_id)
        rig.fanout.session_id = rig.idle_session_id
        rig.session_id, rig.animal = None, None
        self.c.refresh_roster()

        def done(_: Any) -> None:
            if animal:
                self.c.pages.load_history(animal, refresh=True)

        self.c.run_job(f"checking out {animal}",
                       lambda job: self.c.writer.call(lambda c: store.check_out(c, session_id, operator)), done)

    def give_unattended(self, gift: UnattendedGift) -> None:
        """Give a box's presses from while nobody was checked in to an animal (logged): the run is closed, a
        fresh run of no animal takes the box's data from now, and the closed run's trials are derived."""
        rig = self.rigs.get(gift.rig)
        if rig is None or rig.idle_session_id is None:
            return
        old = rig.idle_session_id
        loaded = self.c.protocols.get(gift.animal, rig.protocol)
        stated = rig.stated_stage()
        stage = stated if stated is not None and loaded.protocol.stage(stated) is not None else \
            self.roster().default_stage(gift.animal, gift.rig) or None

        def switched(new: int) -> None:
            rig.idle_session_id = new
            if rig.session_id is None:
                rig.fanout.session_id = new          # from here on the box's data go to the fresh run
            self.c.engine.forget_unattended(gift.rig)
            self.c.run_job(f"giving {gift.rig}'s trials to {gift.animal}", lambda job: self.c.writer.call(
                lambda c: store.give_run(c, old, animal=gift.animal, operator=gift.operator, reason=gift.reason,
                                         protocol=_text(loaded), stage=stage)), given)

        def given(trials: int) -> None:
            self.c.protocols.setdefault(gift.animal, loaded)
            self.c.say(f"{trials} trials from {gift.rig} given to {gift.animal} (logged).")
            self.c.pages.load_history(gift.animal, refresh=True)
            self.c.refresh_roster()

        self.c.run_job(f"closing {gift.rig}'s run",
                       lambda job: self.c.writer.call(lambda c: store.start_idle_run(c, rig.source_id, gift.rig)),
                       switched)

    def close(self) -> None:
        """Stop every source, then check out every session and end every idle run (the events matter more than
        the end times: a store failure here is not raised)."""
        for rig in self.rigs.values():
            rig.source.stop()
        checked_in = [r.session_id for r in self.rigs.values() if r.session_id is not None]
        idle = [r.idle_session_id for r in self.rigs.values() if r.idle_session_id is not None]
        try:
            self.c.writer.call(lambda c: store.close_all(c, checked_in, idle))
        except Exception:  # noqa: BLE001 - the events matter more than the end times
            pass
