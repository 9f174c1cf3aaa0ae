"""The fan-out from a source to the store and to the engine.

Rule: a source's reader thread calls the `Fanout` with each `Batch`; the batch
goes to the store writer's queue (never blocks) and to the engine's queue
without waiting: when the engine queue is full the display misses that batch
(counted in `engine_dropped`), the store does not. The display never waits
for the disk, and a full or locked disk never stops the display. Each engine
batch is stamped with `time.monotonic()` in the reader's thread, so the app
can measure event-to-screen latency. `session_id` may be changed at any time
(check-in, check-out): each batch goes wholly to the session in force when the
reader handed it over.
"""

from __future__ import annotations

import queue
import time
from dataclasses import dataclass, field

from drivers.status import Batch
from monitor.store.writer import StoreWriter


@dataclass(frozen=True, slots=True)
class EngineBatch:
    """What the engine receives: whose batch it is, the batch, and when the reader handed it over."""

    source_id: int
    session_id: int
    batch: Batch
    stamped: float = field(default=0.0, compare=False)  # time.monotonic() in the reader's thread


class Fanout:
    """A source's `BatchSink` that feeds the store and, optionally, the engine."""

    def __init__(self, writer: StoreWriter, *, source_id: int, session_id: int, live: bool,
                 engine: queue.Queue | None = None) -> None:
        self.writer = writer
        self.source_id = source_id
        self.session_id = session_id
        self.live = live
        self.engine = engine
        self.engine_dropped = 0

    def __call__(self, batch: Batch) -> None:
        stamped = time.monotonic()
        session_id = self.session_id
        self.writer.submit(batch, source_id=self.source_id, session_id=session_id, live=self.live)
        if self.engine is not None:
            try:
                self.engine.put_nowait(EngineBatch(self.source_id, session_id, batch, stamped))
            except queue.Full:
                self.engine_dropped += 1
