"""The fan-out from a source to the store and to the engine.

Rule: a source's reader thread calls the `Fanout` with each `Batch`; the batch
goes to the store writer's queue (never blocks) and to the engine's queue
without waiting: when the engine queue is full the display misses that batch
(counted in `engine_dropped`), the store does not. The display never waits
for the disk, and a full or locked disk never stops the display.
"""

from __future__ import annotations

import queue
from typing import NamedTuple

from drivers.status import Batch
from monitor.store.writer import StoreWriter


class EngineBatch(NamedTuple):
    """What the engine receives: whose batch it is, and the batch."""

    source_id: int
    session_id: int
    batch: Batch


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
        self.writer.submit(batch, source_id=self.source_id, session_id=self.session_id, live=self.live)
        if self.engine is not None:
            try:
                self.engine.put_nowait(EngineBatch(self.source_id, self.session_id, batch))
            except queue.Full:
                self.engine_dropped += 1
