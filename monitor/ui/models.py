"""View models: the plain, frozen data the app layer hands to the screens.

Rule: the UI draws only what is in these dataclasses and never asks the engine,
the store or a driver for anything. They hold numbers and words, not Qt
objects. Small per-tick data (a rig tile) are tuples and compare by value;
long series (numpy arrays) live in parts with `eq=False` that compare by
identity: the app pushes the *same* part object when that part did not change,
and a screen redraws a part only when the pushed object is a new one. Missing
figures are `None` (or NaN inside arrays) and are shown as a dash, never as 0.
Text that came from a device or a file is shown as plain text, never as markup.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass, field
from enum import Enum

import numpy as np

from monitor.core.session.start_drop import StartDrop


class Connection(Enum):
    """A rig's connection state: a word, a shape and an Okabe–Ito colour name."""

    LIVE = ("live", "disc", "bluish_green")             # events arriving in a session
    IDLE = ("idle", "ring", "sky_blue")                 # connected, no session running
    QUIET = ("quiet", "triangle", "orange")             # session running, no events for a while
    RETRYING = ("retrying", "diamond", "reddish_purple")  # lost, reopening the port or file
    LOST = ("lost", "cross", "vermillion")              # disconnected, not coming back by itself
    UNATTENDED = ("unattended", "square", "blue")   # presses arrive with no session

    def __init__(self, word: str, shape: str, colour: str) -> None:
        self.word = word
        self.shape = shape
        self.colour = colour


CLEARED_BY = "rigside (no longer true)"   # who "acknowledges" an alert whose condition cleared by itself


class Severity(Enum):
    """How much an alert asks of a person; only URGENT makes a sound or a tray message."""

    INFO = (0, "info", "ring")
    ATTENTION = (1, "attention", "triangle")
    URGENT = (2, "urgent", "cross")

    def __init__(self, rank: int, word: str, shape: str) -> None:
        self.rank = rank
        self.word = word
        self.shape = shape

    @property
    def loud(self) -> bool:
        return self is Severity.URGENT


class StoreHealth(Enum):
    """The store writer's state as the status bar shows it."""

    SAVING = ("saving", False)       # commits keep up
    BEHIND = ("behind", False)       # queue growing, still within bounds
    OVERFLOW = ("OVERFLOW", True)    # queue full: events are being held in memory only
    FAILED = ("FAILED", True)        # the writer stopped (disk full, locked, ...)

    def __init__(self, word: str, loud: bool) -> None:
        self.word = word
        self.loud = loud


@dataclass(frozen=True)
class RigTileState:
    """Everything one overview tile shows for one rig."""

    rig: str
    animal: str | None
    connection: Connection
    session_seconds: float | None = None
    trials_today: int = 0
    hit_rate: float | None = None              # rolling hit rate in [0, 1]
    hit_low: float | None = None               # its 95 % interval (the tile says "95 % CI")
    hit_high: float | None = None
    last_interval_ms: float | None = None
    hist_counts: tuple[int, ...] = ()
    hist_edges_ms: tuple[float, ...] = ()      # len(edges) == len(counts) + 1
    window_low_ms: float | None = None
    window_high_ms: float | None = None
    alert_count: int = 0
    alert_severity: Severity | None = None
    source_text: str = ""                      # port or file path, shown as plain text
    unattended_presses: int = 0                # presses or trials with nobody checked in (kept, can be given)
    hit_window: int = 0                        # trials behind the rolling hit rate (at most the rolling size)

    def __post_init__(self) -> None:
        if self.hist_counts and len(self.hist_edges_ms) != len(self.hist_counts) + 1:
            raise ValueError("hist_edges_ms must have one more entry than hist_counts")


@dataclass(frozen=True, eq=False)
class HistogramData:
    """Counts over fixed bin edges (ms): today's and the previous session's."""

    edges_ms: np.ndarray
    today: np.ndarray
    previous: np.ndarray | None = None

    def __post_init__(self) -> None:
        if len(self.edges_ms) != len(self.today) + 1:
            raise ValueError("edges_ms must have one more entry than today")
        if self.previous is not None and len(self.previous) != len(self.today):
            raise ValueError("previous must have as many bins as today")


@dataclass(frozen=True, eq=False)
class TodayState:
    """The live part of an animal page: changes with every trial."""

    linear: HistogramData
    log: HistogramData
    window_low_ms: float | None
    window_high_ms: float | None
    target_ms: float | None
    trial_index: np.ndarray          # x of the rolling hit rate (trial number in session)
    rolling_rate: np.ndarray         # y in [0, 1]
    rolling_low: np.ndarray          # interval band (same length), NaN where undefined
    rolling_high: np.ndarray
    rolling_size: int = 50           # trials per rolling window, for the legend
    interval_level: float = 0.95
    trials: int = 0
    hits: int = 0
    premature: int = 0
    lone: int = 0
    omission: int = 0
    session_seconds: float | None = None


@dataclass(frozen=True, eq=False)
class CurveState:
    """The learning curve across sessions with stages and the plateau verdict."""

    session: np.ndarray              # session index (1-based)
    measure: np.ndarray              # per-session value (e.g. hit rate)
    low: np.ndarray                  # its interval
    high: np.ndarray
    stage: tuple[str, ...]           # stage name per session
    measure_name: str = "hit rate"
    criterion: float | None = None   # the plateau threshold, drawn as a line
    plateau_session: int | None = None
    plateau_word: str = "not reached"
    plateau_reason: str = ""
    trials: tuple[int, ...] = ()     # completed trials behind each point
    final_stage: str = ""            # the stage the plateau is judged in


@dataclass(frozen=True, eq=False)
class ConsolidationState:
    """Transparent measures first, then the model's slow-state fraction."""

    trials_since_plateau: int | None
    sessions_since_plateau: int | None
    interval_error: float | None     # median |ln(interval / target)| of the latest included session
    cv: float | None
    start_drops: tuple[StartDrop, ...]
    session: np.ndarray              # sessions with a fitted slow-state fraction
    fraction: np.ndarray             # estimate in [0, 1]
    fraction_low: np.ndarray         # 90 % interval
    fraction_high: np.ndarray
    status: tuple[str, ...]          # word per session: "estimated", "not constrained", ...
    model_comparison: str = ""       # one sentence: one-rate vs two-rate
    forecast_low: int | None = None  # sessions until the level below, as a range
    forecast_high: int | None = None
    forecast_level: float = 0.8
    forecast_text: str = ""          # the forecast as words ("already above 0.80", ...); "" when none
    estimate_text: str = ""          # the last session's figure: a point only when "estimated"
    live_text: str = ""              # this session's figure from the cached fit, not refitted ("" when none)
    measures_session: int | None = None   # the session the interval error and CV are of (the animal's count)
    caveat: str = ("A model quantity of a fitted behavioural model, not proof that the "
                   "behaviour no longer depends on a brain area.")


@dataclass(frozen=True)
class SessionRow:
    """One row of the animal's session table."""

    index: int
    start: str                       # local start time, already formatted
    rig: str
    stage: str
    trials: int
    hits: int
    hit_rate: float | None
    median_ms: float | None
    cv: float | None
    excluded: bool = False
    exclusion_reason: str = ""
    conditions: str = ""             # short summary of condition records


@dataclass(frozen=True, eq=False)
class AnimalPageState:
    """Everything one animal page shows; parts redraw only when replaced."""

    animal: str
    rig: str | None
    protocol: str
    today: TodayState | None
    curve: CurveState | None
    consolidation: ConsolidationState | None
    sessions: tuple[SessionRow, ...] = ()
    care_text: str = ""              # water / weight summary line (advisory)
    eligibility_text: str = ""       # the eligibility rule's verdict and reason, one sentence (advisory)


@dataclass(frozen=True)
class Alert:
    """One alert as the list shows it; the app stores it."""

    id: int
    time: dt.datetime
    rig: str
    animal: str | None
    kind: str                        # e.g. "silent", "lever held", "disconnected"
    text: str
    severity: Severity
    acknowledged_by: str | None = None
    acknowledged_at: dt.datetime | None = None


@dataclass(frozen=True)
class StatusState:
    """The status bar: sources and the store writer."""

    sources_text: str = "no sources"
    store: StoreHealth = StoreHealth.SAVING
    store_text: str = ""
    sources_detail: str = ""          # every box that is not reading, one per line (the tooltip)
    sources_trouble: bool = False     # some box is not reading: the text is marked


@dataclass(frozen=True)
class Roster:
    """What the check-in dialog offers: animals, boxes, stages and who is in which box."""

    animals: tuple[str, ...] = ()
    rigs: tuple[str, ...] = ()
    stages: tuple[str, ...] = ()
    usual_rigs: dict[str, tuple[str, ...]] = field(default_factory=dict)
    occupied: dict[str, str] = field(default_factory=dict)   # rig -> animal checked in
    operators: tuple[str, ...] = ()
    current_stage: dict[str, str] = field(default_factory=dict)   # animal -> stage of its latest session
    first_stage: dict[str, str] = field(default_factory=dict)     # rig -> its protocol's first stage
    box_stage: dict[str, str] = field(default_factory=dict)       # rig -> the stage the box itself sent

    def default_stage(self, animal: str, rig: str) -> str:
        """Check-in's stage: what the box says, else the animal's current stage, else the protocol's first."""
        for found in (self.box_stage.get(rig), self.current_stage.get(animal.strip()), self.first_stage.get(rig)):
            if found and found in self.stages:
                return found
        return self.stages[0] if self.stages else ""


@dataclass(frozen=True)
class CheckOut:
    """A person's confirmed statement: the animal in this box is out now."""

    rig: str
    animal: str
    operator: str


@dataclass(frozen=True)
class UnattendedGift:
    """A person's statement: the presses this box sent with nobody checked in were this animal's."""

    rig: str
    animal: str
    operator: str
    reason: str


@dataclass(frozen=True)
class CheckIn:
    """A person's statement: this animal is in this box now."""

    animal: str
    rig: str
    operator: str
    weight_g: float
    stage: str


@dataclass(frozen=True)
class ConditionRecord:
    """A manipulation or condition attached to one session."""

    animal: str
    session: int
    what: str
    dose: str
    volume_ul: float | None
    sham: bool
    note: str = ""


@dataclass(frozen=True)
class Exclusion:
    """A flag keeping one session out of curves and fits, with its reason."""

    animal: str
    session: int
    reason: str
    excluded: bool = True            # False: undo an earlier exclusion (the reason says why)


@dataclass(frozen=True)
class SerialDevice:
    """A serial device the app discovered, as plain data."""

    path: str
    description: str
    serial_number: str | None


@dataclass(frozen=True)
class RigSetup:
    """A rig as the setup dialog describes it; checked by `setup.validate_rig_setup`."""

    name: str
    source: str                      # "serial" or "file"
    path: str                        # device path or log file path
    serial_number: str | None = None
    mapping_path: str | None = None
    valve_ul_per_ms: float | None = None
    protocol_path: str = ""
    reset: bool = True               # serial: the board resets (and sends its header) when the port opens
