"""Live simulated rigs: sessions paced in real time (or `speed` times faster) on an output.

Rule: a `LiveRig` runs in its own thread. Simulated time runs `speed` times
faster than the monotonic clock from the moment the box boots, and each line
goes out when its time comes (device counter values are simulated time, so
intervals stay true at any speed). The box boots, and sends its header, when
the output is ready (a pty or socket: once a reader opens it). Faults land at once
(`inject`) or on a schedule. Unplug, silence and reset drop the rest of the
trial in progress; after an unplug the box waits, up to `drain_timeout`, for
the reader to take what was sent, so `output.sent` stays what the reader got.
`stop()` ends the thread within one polling step (20 ms), lets the reader
drain, and closes the output.
"""

from __future__ import annotations

import queue
import threading
import time
from datetime import datetime
from pathlib import Path

import numpy as np

from mock_rig.faults import Fault
from mock_rig.history import Animal
from mock_rig.outputs import Output, PtyOutput, SocketOutput, pty_available
from mock_rig.rig import Board
from mock_rig.tasks import Session

STEP_S = 0.02
SETTLE_S = 0.25  # after a drain, before the master closes (longer than a reader's read timeout)
_DROP = "drop"


class LiveRig:
    """One simulated box playing `sessions` sessions of `animal` on `output`."""

    def __init__(
        self,
        animal: Animal,
        output: Output,
        speed: float = 1.0,
        faults: tuple[Fault, ...] = (),
        sessions: int | None = 1,
        break_hours: float = 23.0,
        drain_timeout: float = 2.0,
    ) -> None:
        if speed <= 0:
            raise ValueError("speed must be positive")
        self.animal = animal
        self.output = output
        self.speed = speed
        self.sessions = sessions
        self.break_hours = break_hours
        self.drain_timeout = drain_timeout
        self._schedule = sorted(faults, key=lambda f: f.at)
        self._injected: queue.SimpleQueue[Fault] = queue.SimpleQueue()
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None
        self._started_at: float | None = None
        self._held: list[bytes] = []
        self._hold_until = 0.0
        self.session: Session | None = None
        self.board: Board | None = None
        self.sessions_played = 0
        self.faults_applied: list[Fault] = []
        self.error: BaseException | None = None
        self._mono0 = 0.0

    # -- control -------------------------------------------------------------
    def start(self) -> "LiveRig":
        self._thread = threading.Thread(target=self._run, name=f"mock-rig-{self.animal.name}",
                                        daemon=True)
        self._thread.start()
        return self

    def signal_stop(self) -> None:
        """Ask the box to stop without waiting."""
        self._stop.set()

    def stop(self, timeout: float = 5.0) -> None:
        """Stop the box and close its output."""
        self._stop.set()
        if self._thread is not None:
            self._thread.join(timeout)

    def join(self, timeout: float | None = None) -> bool:
        """Wait for the box to finish its sessions; True when it has."""
        if self._thread is not None:
            self._thread.join(timeout)
            return not self._thread.is_alive()
        return True

    @property
    def running(self) -> bool:
        return self._thread is not None and self._thread.is_alive()

    def inject(self, kind: str, seconds: float | None = None) -> None:
        """Apply a fault now (see mock_rig.faults for the kinds)."""
        self._injected.put(Fault(kind, 0.0, seconds))

    # -- the loop --------------------------------------------------------------
    def _run(self) -> None:
        try:
            while not self._stop.is_set():
                if self.sessions is not None and self.sessions_played >= self.sessions:
                    break
                if not self._wait(lambda: self.output.ready()):
                    break
                self._play_session()
        except BaseException as exc:  # surfaced through .error, the thread must not die silently
            self.error = exc
        finally:
            self._release_held()
            self._drain()
            self.output.close()

    def _play_session(self) -> None:
        wall_start = datetime.now().astimezone()
        breaks = None if self.sessions_played == 0 else self.break_hours
        session, board, header = self.animal.open_session(wall_start, breaks)
        self.session, self.board = session, board
        self._mono0 = time.monotonic()
        if self._started_at is None:
            self._started_at = self._mono0
        self._emit(header)
        while (chunk := session.next_chunk()) is not None:
            for t, name, args in chunk:
                status = self._wait_sim(t)
                if status is False:
                    return
                if status == _DROP:
                    break
                line = board.encode(t, name, args)
                if line is not None:
                    self._emit(line)
        self.animal.close_session(session, board, None)
        self.sessions_played += 1

    def sim_now(self) -> int:
        """Simulated µs since this session's boot."""
        return int((time.monotonic() - self._mono0) * self.speed * 1e6)

    def _wait_sim(self, t_us: int) -> bool | str:
        """Wait for simulated time `t_us`, applying faults; False when stopping."""
        while True:
            if self._stop.is_set():
                return False
            fault = self._due_fault()
            if fault is not None:
                result = self._apply(fault)
                if result is not None:
                    return result
                continue
            if self._held and time.monotonic() >= self._hold_until:
                self._release_held()
            self.output.pump()
            remaining = self._mono0 + t_us / 1e6 / self.speed - time.monotonic()
            if remaining <= 0:
                return True
            self._stop.wait(min(remaining, STEP_S))

    def _wait(self, condition, timeout: float | None = None) -> bool:
        deadline = None if timeout is None else time.monotonic() + timeout
        while not condition():
            if self._stop.is_set() or (deadline is not None and time.monotonic() >= deadline):
                return False
            self.output.pump()
            self._stop.wait(STEP_S)
        return True

    def _due_fault(self) -> Fault | None:
        try:
            return self._injected.get_nowait()
        except queue.Empty:
            pass
        if self._schedule and self._started_at is not None:
            if time.monotonic() - self._started_at >= self._schedule[0].at:
                return self._schedule.pop(0)
        return None

    def _emit(self, line: bytes) -> None:
        if self._held or time.monotonic() < self._hold_until:
            self._held.append(line)
        else:
            self.output.write(line)

    def _release_held(self) -> None:
        held, self._held = self._held, []
        for line in held:
            self.output.write(line)
        self.output.flush()

    # -- faults ----------------------------------------------------------------
    def _apply(self, fault: Fault) -> bool | str | None:
        """Apply `fault`; return False (stopping), _DROP (trial lost) or None."""
        self.faults_applied.append(fault)
        session, board = self.session, self.board
        assert session is not None and board is not None
        seconds = fault.duration
        sim_span = int(seconds * self.speed * 1e6)
        kind = fault.kind
        if kind == "garbage":
            rng = np.random.default_rng(len(self.faults_applied))
            for _ in range(max(1, int(seconds))):
                self._emit(_garbage_line(rng))
            return None
        if kind == "burst":
            self._hold_until = time.monotonic() + seconds
            return None
        if kind == "stuck_lever":
            session.faults.lever_stuck_until = self.sim_now() + sim_span
            return None
        if kind == "valve_open":
            session.faults.valve_open_until = self.sim_now() + sim_span
            return None
        if kind == "silent":
            if not self._pause(seconds):
                return False
            session.skip_to(self.sim_now())
            return _DROP
        if kind == "unplug":
            self._release_held()
            self._drain()
            self.output.unplug()
            if not self._pause(seconds):
                return False
            self.output.replug()
            if not self._wait(lambda: self.output.ready()):
                return False
        self._reboot(session, board)
        return _DROP

    def _reboot(self, session: Session, board: Board) -> None:
        now = self.sim_now()
        self._emit(board.boot(now))
        session.skip_to(now)
        for t, name, args in session.param_events(now):
            line = board.encode(t, name, args)
            if line is not None:
                self._emit(line)

    def _drain(self) -> None:
        """Give the reader up to `drain_timeout` to take what was sent (a pty or socket loses unread bytes).

        Then wait `SETTLE_S` more: a reader blocked in a timed read holds bytes it
        has taken but not yet returned, and pyserial drops them if the port dies then.
        """
        if isinstance(self.output, (PtyOutput, SocketOutput)) and self.output.plugged:
            deadline = time.monotonic() + self.drain_timeout
            while self.output.unread() and time.monotonic() < deadline:
                self.output.pump()
                time.sleep(STEP_S)
            time.sleep(SETTLE_S)

    def _pause(self, seconds: float) -> bool:
        deadline = time.monotonic() + seconds
        self._wait(lambda: time.monotonic() >= deadline)
        return not self._stop.is_set()


def _garbage_line(rng: np.random.Generator) -> bytes:
    """A line of noise as a glitching USB link delivers it: non-ASCII first byte, then bytes."""
    body = rng.integers(0, 256, size=int(rng.integers(3, 40)), dtype=np.uint8).tobytes()
    return bytes([0x80 + int(rng.integers(0, 128))]) + body.replace(b"\n", b"?") + b"\n"


def start_rigs(
    animals: list[Animal],
    link_dir: str | None = None,
    speed: float = 1.0,
    sessions: int | None = None,
    record: bool = False,
    via: str = "auto",
) -> list[LiveRig]:
    """Start one simulated box per animal, in threads; stop them with stop_rigs.

    `via` is "pty", "socket" (a local TCP port, for pyserial's socket:// URL) or
    "auto" (a pty where the platform has them, else a socket). With `link_dir`,
    each pty box keeps a symlink `link_dir/<animal>` pointing at its current
    device (a re-plug moves it). Each rig's `output.device` is what a reader opens.
    """
    if via not in ("auto", "pty", "socket"):
        raise ValueError(f"via: expected auto, pty or socket, got {via!r}")
    use_pty = via == "pty" or (via == "auto" and pty_available())
    rigs = []
    for animal in animals:
        output: Output
        if use_pty:
            link = Path(link_dir) / animal.name if link_dir else None
            output = PtyOutput(link=link, record=record)
        else:
            output = SocketOutput(record=record)
        rigs.append(LiveRig(animal, output, speed=speed, sessions=sessions).start())
    return rigs


def stop_rigs(rigs: list[LiveRig]) -> None:
    """Stop every rig (signals all first, then joins)."""
    for rig in rigs:
        rig.signal_stop()
    for rig in rigs:
        rig.stop()
