"""monitor.app.live.pipeline: each batch reaches the store's queue, and the engine's when it has room."""

from __future__ import annotations

import queue
import time

from drivers.status import Batch
from drivers.wire import WireDecoder, encode_event
from monitor.app.live.pipeline import EngineBatch, Fanout


class RecordingWriter:
    """Stands in for StoreWriter.submit, which never blocks."""

    def __init__(self) -> None:
        self.submitted: list[tuple] = []

    def submit(self, batch, *, source_id, session_id, live) -> None:
        self.submitted.append((batch, source_id, session_id, live))


def test_a_full_engine_queue_never_costs_the_store_a_batch():
    writer = RecordingWriter()
    engine: queue.Queue = queue.Queue(maxsize=2)
    fanout = Fanout(writer, source_id=4, session_id=9, live=True, engine=engine)
    decoder = WireDecoder()
    batches = [Batch(decoder.feed(encode_event(i, "lick")), time.time()) for i in range(5)]
    for batch in batches:
        fanout(batch)
    assert [s[0] for s in writer.submitted] == batches
    assert all(s[1:] == (4, 9, True) for s in writer.submitted)
    assert engine.get_nowait() == EngineBatch(4, 9, batches[0])
    assert engine.get_nowait().batch is batches[1]
    assert fanout.engine_dropped == 3
