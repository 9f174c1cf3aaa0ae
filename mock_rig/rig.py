"""The box's board: device counter, boot header and firmware filter.

Rule: the board turns task events in simulated time (µs since the simulation
began) into wire-format lines, with the project's encoder only
(`drivers.wire.encode_event`, `encode_header`). Its counter counts µs from a
start value at boot and wraps at 2^wrap (32 bits by default; wrap=0 never
wraps). A boot or reset sends a header with `fw=` and `start=` (the wall time
at the header's tick, ISO 8601 with UTC offset) and restarts the counter.
Older firmware (`legacy=True`) sends no `outcome` and no `param` events.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import datetime, timedelta

from drivers.wire import encode_event, encode_header

LEGACY_DROPPED = frozenset({"outcome", "param"})
BOOT_US = 1_500_000  # counter value when a freshly booted board sends its header


@dataclass(frozen=True)
class BoardConfig:
    """Firmware and counter settings of one simulated box."""

    fw: str = "presspair-v2"
    wrap: int = 32
    legacy: bool = False  # older firmware: no outcome/param events
    counter_start_us: int | None = None  # counter at boot (None: BOOT_US); near 2^wrap for an early wrap
    rig_name: str | None = None  # sent as rig= in the header when set


def wrap_soon(seconds: float, wrap: int = 32) -> int:
    """A counter start that wraps `seconds` after boot."""
    return (1 << wrap) - int(seconds * 1e6)


class Board:
    """Encodes one box's lines; `wall0` is the wall time at simulated time 0."""

    def __init__(self, config: BoardConfig, wall0: datetime) -> None:
        if wall0.tzinfo is None:
            raise ValueError("wall0 must carry a UTC offset")
        self.config = config
        self.wall0 = wall0
        self._mask = (1 << config.wrap) - 1 if config.wrap else 0
        self._boot_sim = 0
        self._base = 0

    def wall(self, t_sim_us: int) -> datetime:
        """Wall-clock time of simulated time `t_sim_us`."""
        return self.wall0 + timedelta(microseconds=t_sim_us)

    def boot(self, t_sim_us: int, counter_start_us: int | None = None) -> bytes:
        """Boot or reset at `t_sim_us`: restart the counter and return the header line."""
        start = self.config.counter_start_us if counter_start_us is None else counter_start_us
        self._boot_sim = t_sim_us
        self._base = BOOT_US if start is None else start
        fields: dict[str, object] = {"fw": self.config.fw}
        fields["start"] = self.wall(t_sim_us).isoformat(timespec="seconds")
        if self.config.rig_name:
            fields["rig"] = self.config.rig_name
        return encode_header(clock="us", wrap=self.config.wrap, **fields)

    def raw_time(self, t_sim_us: int) -> int:
        """Counter value at simulated time `t_sim_us`."""
        count = self._base + (t_sim_us - self._boot_sim)
        return count & self._mask if self._mask else count

    def encode(self, t_sim_us: int, name: str, args: tuple[object, ...]) -> bytes | None:
        """The line the firmware sends for an event, or None when it sends none."""
        if self.config.legacy and name in LEGACY_DROPPED:
            return None
        return encode_event(self.raw_time(t_sim_us), name, *args)
