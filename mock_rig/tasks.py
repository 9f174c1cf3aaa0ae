"""Task programs as a box runs them: the two-press interval task and the joystick hold task.

Rule: a `Session` produces the events of one training session in simulated
device time (µs since the board booted), one trial at a time (`next_chunk`), so
a live player can pace them and faults can land between trials. The box is the
judge: a trial's outcome is decided from the device-time interval between the
two press onsets (or the time the joystick stays past threshold) against the
integer-ms window in force, which is announced with `param` events whenever it
changes. Two-press trial: `trial_start`; first press after a latency (none
within `response_ms`: omission); second press `interval` later (none within
`trial_timeout_ms`: lone); `outcome hit|miss`; reward and licks on a hit. The
inter-trial interval restarts when a response made during it ends (such
presses get no outcome: they are counted apart); a second press sooner than
`premature_ms` is `outcome premature`. Completed trials (hit or miss) are the
ones the learner learns from. Stages are announced by name (`param stage
NAME`) and advance between sessions. An adaptive window moves its tolerance by
`adapt_step` every `adapt_every` completed trials, towards holding
`adaptive_rate` (the analysis core's fallback rule, so a rig without `param`
events is judged the same way).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from mock_rig.learner import Learner, TrialLatent

TWO_PRESS = "two_press"
JOYSTICK_HOLD = "joystick_hold"
JOYSTICK_PERIOD_US = 10_000  # 100 Hz deflection samples (contract: at most 200 Hz)

Emit = tuple[int, str, tuple[object, ...]]  # (sim time µs, event word, args)


@dataclass(frozen=True)
class Stage:
    """One shaping stage: target, window rule and trial timing."""

    name: str
    target_ms: float
    tolerance: float = 0.2  # window = target * (1 ± tolerance) unless window_ms is set
    window_ms: tuple[float, float] | None = None  # asymmetric fixed window
    adaptive_rate: float | None = None  # hold this reward rate by retuning the tolerance
    tolerance_min: float = 0.05
    tolerance_max: float = 0.5
    adapt_every: int = 20  # completed trials between window updates
    adapt_step: float = 0.02  # tolerance change per update
    iti_ms: float = 2500.0  # inter-trial interval (restarts on a press)
    premature_ms: float = 0.0  # a second press sooner than this is premature
    response_ms: float = 10000.0  # first press within this after trial_start, else omission
    advance_min_hit_rate: float = 0.6  # advance after a session at or above this ...
    advance_min_trials: int = 150  # ... with at least this many completed trials

    def window(self, tolerance: float | None = None) -> tuple[int, int]:
        """Integer-ms window in force for `tolerance` (the rig sends these values)."""
        if self.window_ms is not None and tolerance is None:
            return int(round(self.window_ms[0])), int(round(self.window_ms[1]))
        tol = self.tolerance if tolerance is None else tolerance
        return int(round(self.target_ms * (1 - tol))), int(round(self.target_ms * (1 + tol)))


@dataclass(frozen=True)
class ScenarioProtocol:
    """A training protocol: task, stages, session limits, plateau criterion."""

    name: str
    stages: tuple[Stage, ...]
    task: str = TWO_PRESS
    version: int = 1
    trial_timeout_ms: float = 3000.0
    reward_ul: float = 25.0
    max_minutes: float = 50.0
    max_trials: int = 600
    max_water_ul: float = 8000.0
    plateau_min_hit_rate: float = 0.5
    plateau_sessions: int = 3
    joystick_threshold_deg: float = 15.0

    @property
    def final(self) -> Stage:
        return self.stages[-1]


@dataclass
class SessionCounts:
    """What the box decided in one session."""

    trials: int = 0  # completed: hit or miss
    hits: int = 0
    misses: int = 0
    premature: int = 0  # second press sooner than premature_ms
    inter_trial: int = 0  # responses during the inter-trial interval
    lone: int = 0
    omissions: int = 0
    water_ul: float = 0.0

    @property
    def hit_rate(self) -> float:
        return self.hits / self.trials if self.trials else 0.0


@dataclass
class Faults:
    """Behavioural faults in force, as simulated-time limits (µs)."""

    lever_stuck_until: int = -1
    valve_open_until: int = -1


@dataclass
class Session:
    """One session of `protocol` at stage `stage_index`, driven by `learner`."""

    protocol: ScenarioProtocol
    stage_index: int
    learner: Learner
    rng: np.random.Generator
    start_us: int = 0
    counts: SessionCounts = field(default_factory=SessionCounts)
    faults: Faults = field(default_factory=Faults)
    latents: list[tuple[int, float, bool, TrialLatent]] | None = None  # set to [] to record

    def __post_init__(self) -> None:
        self.now = self.start_us
        self.stage = self.protocol.stages[self.stage_index]
        self.tolerance = self.stage.tolerance
        self.low_ms, self.high_ms = self.stage.window()
        self._adapt_trials = 0
        self._adapt_hits = 0
        self._started = False
        self._ended = False
        self._lever_held = False

    @property
    def end_us(self) -> int:
        return self.start_us + int(self.protocol.max_minutes * 60e6)

    def skip_to(self, t_us: int) -> None:
        """Move the session clock forward (the box was off or hung until `t_us`)."""
        self.now = max(self.now, t_us)

    def param_events(self, t: int) -> list[Emit]:
        """The parameters in force, as the box announces them."""
        return [
            (t, "param", ("stage", self.stage.name)),
            (t, "param", ("target_ms", int(round(self.stage.target_ms)))),
            (t, "param", ("window_low_ms", self.low_ms)),
            (t, "param", ("window_high_ms", self.high_ms)),
        ]

    def done(self) -> bool:
        p = self.protocol
        return (
            self.now >= self.end_us
            or self.counts.trials >= p.max_trials
            or self.counts.water_ul >= p.max_water_ul
        )

    def next_chunk(self) -> list[Emit] | None:
        """Events of the next trial (with its inter-trial interval); None after session_end."""
        if self._ended:
            return None
        if not self._started:
            self._started = True
            return [(self.now, "session_start", ())] + self.param_events(self.now)
        if self.done():
            self._ended = True
            out: list[Emit] = []
            if self._lever_held:
                out.append((self.now, "lever_up", ()))
                self._lever_held = False
            return out + [(self.now, "session_end", ())]
        if self.protocol.task == JOYSTICK_HOLD:
            chunk = self._joystick_trial()
        else:
            chunk = self._two_press_trial()
        self._valve_licks(chunk)
        chunk.sort(key=lambda e: e[0])
        return chunk

    # -- two-press ---------------------------------------------------------
    def _two_press_trial(self) -> list[Emit]:
        out: list[Emit] = []
        t = self.now
        if self.faults.lever_stuck_until > t:
            return self._stuck_trial(out, t)
        if self._lever_held:
            out.append((t, "lever_up", ()))
            self._lever_held = False
        out.append((t, "trial_start", ()))
        first = self._first_response(t)
        if first is None:
            end = t + _us(self.stage.response_ms)
            out.append((end, "outcome", ("omission",)))
            self.counts.omissions += 1
            self._iti(out, end)
            return out
        interval_ms, y, noise = self.learner.produce_ms()
        hold1 = self._press_hold_us()
        timeout = _us(self.protocol.trial_timeout_ms)
        interval_us = max(_us(interval_ms), 2 * 1000 + 20_000)  # presses cannot overlap
        hold1 = min(hold1, interval_us // 2)
        lone = self.rng.random() < self.learner.params.lone_rate or interval_us > timeout
        double = not lone and self.rng.random() < self.learner.double_tap_rate_now()
        if double:
            hold1 = min(hold1, _us(self.rng.uniform(30, 60)))
        out += [(first, "lever_down", ()), (first + hold1, "lever_up", ())]
        if double:
            return self._double_tap(out, first, hold1)
        if lone:
            end = first + timeout
            out.append((end, "outcome", ("lone",)))
            self.counts.lone += 1
            self._iti(out, end)
            return out
        second = first + interval_us
        release = second + self._press_hold_us()
        out += [(second, "lever_down", ()), (release, "lever_up", ())]
        hit = self.low_ms * 1000 <= interval_us <= self.high_ms * 1000
        self._complete(out, second + 500, hit, y, noise)
        self._iti(out, release)
        return out

    def _double_tap(self, out: list[Emit], first: int, hold1: int) -> list[Emit]:
        """A second press right after the first: premature when sooner than premature_ms."""
        second = first + hold1 + _us(self.rng.uniform(20, 80))
        release = second + self._press_hold_us()
        out += [(second, "lever_down", ()), (release, "lever_up", ())]
        interval_ms = (second - first) / 1000.0
        if interval_ms < self.stage.premature_ms:
            out.append((second + 500, "outcome", ("premature",)))
            self.counts.premature += 1
        else:  # no premature rule in force: an ordinary (short) completed trial
            y = math.log(interval_ms / self.learner.params.naive_ms)
            hit = self.low_ms <= interval_ms <= self.high_ms
            self._complete(out, second + 500, hit, y, y - self.learner.x)
        self._iti(out, release)
        return out

    def _stuck_trial(self, out: list[Emit], t: int) -> list[Emit]:
        """Lever held down: the box sees no new press onsets, so trials time out."""
        if not self._lever_held:
            out.append((t, "lever_down", ()))
            self._lever_held = True
        out.append((t + 1000, "trial_start", ()))
        end = t + 1000 + _us(self.stage.response_ms)
        out.append((end, "outcome", ("omission",)))
        self.counts.omissions += 1
        self.now = end + _us(self.stage.iti_ms)
        return out

    def _first_response(self, t: int) -> int | None:
        """Time of the first response after trial_start, or None (omission)."""
        p = self.learner.params
        sated = self.learner.satiety()
        if self.rng.random() < min(0.9, p.omission_rate * (1 + 6 * sated * sated)):
            return None
        latency = self.rng.exponential(p.latency_s * (1 + 2 * sated)) + 0.15
        if latency * 1000 >= self.stage.response_ms:
            return None
        return t + _us(latency * 1000)

    def _press_hold_us(self) -> int:
        return _us(min(max(self.rng.lognormal(4.787, 0.3), 40.0), 400.0))  # median 120 ms

    def _complete(self, out: list[Emit], t: int, hit: bool, y: float, noise: float) -> None:
        """Outcome, reward, licks and learning for a completed trial."""
        self.counts.trials += 1
        out.append((t, "outcome", ("hit" if hit else "miss",)))
        if hit:
            self.counts.hits += 1
            self.counts.water_ul += self.protocol.reward_ul
            out.append((t + 200, "reward", (_num(self.protocol.reward_ul),)))
            lick = t + 200 + _us(self.rng.uniform(150, 400))
            for _ in range(int(self.rng.integers(3, 10))):
                out.append((lick, "lick", ()))
                lick += _us(self.rng.uniform(120, 180))
        else:
            self.counts.misses += 1
        latent = self.learner.learn(self.stage.target_ms, y, noise, hit)
        if self.latents is not None:
            self.latents.append((t, self.stage.target_ms, hit, latent))
        self._adapt(out, t, hit)

    def _adapt(self, out: list[Emit], t: int, hit: bool) -> None:
        """Adaptive window: retune the tolerance to hold the stage's reward rate."""
        stage = self.stage
        if stage.adaptive_rate is None:
            return
        self._adapt_trials += 1
        self._adapt_hits += hit
        if self._adapt_trials < stage.adapt_every:
            return
        observed = self._adapt_hits / self._adapt_trials
        self._adapt_trials = self._adapt_hits = 0
        tol = self.tolerance
        if observed > stage.adaptive_rate:
            tol = max(stage.tolerance_min, tol - stage.adapt_step)
        elif observed < stage.adaptive_rate:
            tol = min(stage.tolerance_max, tol + stage.adapt_step)
        low, high = stage.window(tol)
        self.tolerance = tol
        if (low, high) != (self.low_ms, self.high_ms):
            self.low_ms, self.high_ms = low, high
            out.append((t + 1, "param", ("window_low_ms", low)))
            out.append((t + 1, "param", ("window_high_ms", high)))

    def _iti(self, out: list[Emit], start: int) -> None:
        """Inter-trial interval from `start`, restarted by every response made during it."""
        iti = _us(self.stage.iti_ms)
        rate = self.learner.iti_press_rate_now()
        t = start
        for _ in range(50):
            wait = self.rng.exponential(iti / rate) if rate > 0 else math.inf
            if wait >= iti:
                break
            press = t + int(wait) + 100_000  # the animal is still at the spout briefly
            t = self._inter_trial_response(out, press)
        self.now = t + iti

    def _inter_trial_response(self, out: list[Emit], t: int) -> int:
        """A response during the inter-trial interval; return when it ended (the ITI restarts)."""
        self.counts.inter_trial += 1
        if self.protocol.task == JOYSTICK_HOLD:
            return self._push(out, t, hold_us=_us(self.rng.uniform(50, 300)))[2]
        release = t + self._press_hold_us()
        out += [(t, "lever_down", ()), (release, "lever_up", ())]
        return release

    def _valve_licks(self, chunk: list[Emit]) -> None:
        """A valve stuck open: water flows, the animal licks on and on and soon sates."""
        until = self.faults.valve_open_until
        if until <= 0 or not chunk:
            return
        start, stop = chunk[0][0], min(self.now, until)
        t = start
        while t < stop:
            chunk.append((t, "lick", ()))
            t += _us(self.rng.uniform(130, 200))
        if stop > start:
            self.learner.session_rewards += int((stop - start) / 2e6)

    # -- joystick hold -----------------------------------------------------
    def _joystick_trial(self) -> list[Emit]:
        out: list[Emit] = []
        t = self.now
        out.append((t, "trial_start", ()))
        first = self._first_response(t)
        if first is None or self.rng.random() < self.learner.params.lone_rate:
            end = t + _us(self.stage.response_ms)
            if first is not None:  # a weak push that never reaches threshold
                rest = self._push(out, first, hold_us=0, peak=self.protocol.joystick_threshold_deg * 0.6)[2]
                end = max(end, rest + 1)
            out.append((end, "outcome", ("omission",)))
            self.counts.omissions += 1
            self._iti(out, end)
            return out
        hold_ms, y, noise = self.learner.produce_ms()
        crossed, released, rest = self._push(out, first, hold_us=_us(hold_ms))
        measured = released - crossed
        hit = self.low_ms * 1000 <= measured <= self.high_ms * 1000
        self._complete(out, released + 500, hit, y, noise)
        self._iti(out, rest)
        return out

    def _push(
        self, out: list[Emit], start: int, hold_us: int, peak: float | None = None
    ) -> tuple[int, int, int]:
        """Deflection samples of one push; return (crossed, released, back at rest) sample times."""
        threshold = self.protocol.joystick_threshold_deg
        peak = peak if peak is not None else float(self.rng.uniform(threshold * 1.4, threshold * 2.4))
        rise = _us(self.rng.uniform(60, 140))
        t = start
        crossed = released = -1
        phase_end = start + rise
        # rise, hold above threshold for hold_us, fall: sampled every period
        while True:
            if t <= phase_end:
                value = peak * (t - start) / rise
            elif crossed >= 0 and t < crossed + hold_us:
                value = peak
            else:
                since = t - max(phase_end, crossed + hold_us if crossed >= 0 else phase_end)
                value = max(0.0, peak - peak * since / rise)
            value += float(self.rng.normal(0, 0.2))
            value = max(value, 0.0)
            out.append((t, "joystick", (round(value, 1),)))
            if crossed < 0 and round(value, 1) >= threshold:
                crossed = t
            elif crossed >= 0 and released < 0 and round(value, 1) < threshold:
                released = t
            if value <= 0.5 and t > phase_end:
                t += JOYSTICK_PERIOD_US
                out.append((t, "joystick", (0.0,)))
                break
            t += JOYSTICK_PERIOD_US
        if crossed >= 0 and released < 0:
            released = t
        return crossed, released, t


def _us(ms: float) -> int:
    return int(round(ms * 1000))


def _num(value: float) -> int | float:
    return int(value) if float(value).is_integer() else value
