"""Worker processes beside an import: files read and stored side by side, animals refitted meanwhile.

Rule: the workers (spawned as the pool is made, as many as asked, each with
one BLAS thread, Ctrl-C ignored from their start: the importing process
handles it) take the files in the order given, one at a time as each is free
(`import_file`): each reads, splits and derives its file, then stores it in
its own transaction through its own connection (importer.commit_file)
holding the pool's lock (`writing`), so one worker stores while the other
reads its next file (the lock wakes the next writer at once, where SQLite's
busy handler sleeps 1 to 100 ms); the files are stored about in order, each
whole or not at all. The importing process meanwhile builds the report
entries of the animals whose files are all stored (`Finished` tells which),
its own writes under the same lock. Asked to stop
(`halt`) a worker begins no other file and finishes the one under way; told
to cancel (`stop`) it also rolls back the file under way, and fits stop at
their next check. As soon as an animal's last file is stored its
consolidation model can be refitted in a worker (`refit`, which saves its
own fit in a short transaction), so fits run while later files are still
being imported; such jobs wait until every file has been handed out, so a
file never queues behind a fit. In the workers, and in the importing process
(`few_collections`), Python's cyclic garbage collector runs rarely: the
records and rows are millions of young tuples in no cycle, and at the default
threshold (a collection per 700 new objects, a full one now and then)
collecting took about a tenth of each process's time.
"""

from __future__ import annotations

import gc
import multiprocessing
import os
import signal
import sqlite3
import threading
from collections import Counter, deque
from collections.abc import Callable, Iterable, Iterator, Sequence
from contextlib import contextmanager, nullcontext
from concurrent.futures import CancelledError, Future, ProcessPoolExecutor, wait
from pathlib import Path
from typing import Any

from monitor.store.orphans import end_with_parent

STARTING_S = 60.0  # a worker's start takes about half a second; a PC busy enough to take longer still ends
FEW_COLLECTIONS = 1_000_000  # new objects between two collections of the youngest generation (Python's default: 700)

_cancelled: Any = None  # in a worker: the pool's cancel event (fits stop, a file under way rolls back)
_halted: Any = None  # in a worker: the pool's halt event (no other file begins)
_writing: Any = None  # in a worker: the pool's lock, held while a file is stored
_gathering: Any = None  # in a worker: the pool's barrier, passed once every worker has started
_stores: dict[str, sqlite3.Connection] = {}  # in a worker: its connection to each store it writes


def _start_worker(cancel: Any, halted: Any, writing: Any, gathering: Any) -> None:
    """A worker's first step: it ends with the importing process (monitor.store.orphans); Ctrl-C is the importing
    process's to handle; remember the pool's events, lock and barrier; collect garbage rarely."""
    global _cancelled, _halted, _writing, _gathering
    end_with_parent()
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    _cancelled, _halted, _writing, _gathering = cancel, halted, writing, gathering
    gc.set_threshold(FEW_COLLECTIONS, *gc.get_threshold()[1:])


def _gather() -> None:
    """A worker's first job: wait until every worker of the pool has started (a worker waiting here takes no
    other job, so each worker takes one of these)."""
    try:
        _gathering.wait(timeout=STARTING_S)
    except threading.BrokenBarrierError:  # a worker did not start: the pool reports it on the files' futures
        pass


def import_file(db: str, wait_ms: int, path: Path, data: bytes, parse_options: dict[str, Any],
                store_options: dict[str, Any], earlier: list[Any], operator: str) -> tuple[Any, int]:
    """A worker's job: read, split and derive one file (importer.parse_file with `parse_options`) and store it
    in its own transaction (importer.commit_file); (what it held, sessions superseded). Once the import has
    halted a file not begun raises Abandoned; once it is cancelled the file under way is rolled back."""
    from monitor.store.importer import Abandoned, commit_file, parse_file

    if _halted is not None and _halted.is_set():
        raise Abandoned(f"{path}: not begun")
    parsed = parse_file(path, data, **parse_options)
    conn = _stores.get(db)
    if conn is None:
        from monitor.store.db import open_store

        conn = _stores[db] = open_store(Path(db), busy_timeout_ms=wait_ms, check=False)  # checked by the caller
    with _writing if _writing is not None else nullcontext():
        return commit_file(conn, parsed, earlier, operator, keep=_keep, **store_options)


def _keep() -> bool:
    return _cancelled is None or not _cancelled.is_set()


@contextmanager
def few_collections() -> Iterator[None]:
    """Python's cyclic garbage collector runs rarely inside (the module rule); its thresholds are restored after."""
    old = gc.get_threshold()
    gc.set_threshold(FEW_COLLECTIONS, *old[1:])
    try:
        yield
    finally:
        gc.set_threshold(*old)


def refit(db: str, animal: str) -> dict[str, Any] | None:
    """Refit an animal and save the fit (a worker's job); its block, or None when cancelled."""
    from monitor.store.consolidation_fits import refit_animal

    return refit_animal(db, animal, cancel=None if _cancelled is None else _cancelled.is_set)


class Finished:
    """Which animals have all their files stored, from what each file may hold.

    `holds[i]` is the animal file i holds (known from --animal or its NAME_sNN name), or None when any
    animal may be in it (a mapped file with an animal column)."""

    def __init__(self, holds: Sequence[str | None]) -> None:
        self._ahead = Counter(holds)  # files not stored yet, by the animal they hold
        self._stored: set[str] = set()
        self._told: set[str] = set()

    def stored(self, holds: str | None, animals: Iterable[str]) -> list[str]:
        """A file was stored (holding `holds`, as given to the constructor, and in fact `animals`): the animals
        whose files are now all stored, not told before."""
        self._ahead[holds] -= 1
        self._stored.update(animals)
        if self._ahead[None] > 0:
            return []
        done = sorted(a for a in self._stored - self._told if self._ahead[a] <= 0)
        self._told.update(done)
        return done

    def rest(self) -> list[str]:
        """The stored animals not told yet (the import ended, or was cut short)."""
        rest = sorted(self._stored - self._told)
        self._told.update(rest)
        return rest


class ImportPool:
    """Spawned worker processes for one import, started at once (a context manager: it ends them)."""

    def __init__(self, workers: int) -> None:
        from monitor.store.consolidation_fits import ONE_CORE

        context = multiprocessing.get_context("spawn")
        self.cancel = context.Event()
        self.halted = context.Event()
        # taken by a worker around each file's transaction (and by the caller around its own writes): the next
        # writer starts the moment the lock is free, where SQLite's busy handler would sleep 1 to 100 ms
        self.writing = context.Lock()
        gathering = context.Barrier(workers)
        self._saved = {key: os.environ.get(key) for key in ONE_CORE}
        os.environ.update(ONE_CORE)  # read by each worker's interpreter as it starts, before numpy loads
        self._pool = ProcessPoolExecutor(max_workers=workers, mp_context=context, initializer=_start_worker,
                                         initargs=(self.cancel, self.halted, self.writing, gathering))
        self._held: deque[tuple[Callable[..., Any], tuple, Future]] = deque()
        self._handing_out = True
        # start every worker now (each takes about half a second to start)
        self._starting = [self._submit(_gather) for _ in range(workers)]

    def hand_out(self, job: Callable[..., Any], jobs: Sequence[tuple]) -> dict[Future, int]:
        """`job(*args)` for every `args` of `jobs`, taken by the workers in that order; each future with its
        place. Jobs given to `submit` (fits) go after these."""
        futures = {self._submit(job, *args): i for i, args in enumerate(jobs)}
        self.all_handed_out()
        return futures

    def halt(self, futures: Iterable[Future]) -> None:
        """No other file begins: `futures` not taken yet are dropped, a worker's file under way finishes."""
        self.halted.set()
        for future in futures:
            future.cancel()

    def submit(self, job: Callable[..., Any], *args: Any) -> Future:
        """Run `job(*args)` in a worker once every file has been handed out."""
        if not self._handing_out:
            return self._submit(job, *args)
        future: Future = Future()
        self._held.append((job, args, future))
        return future

    def _release(self) -> None:
        while self._held:
            job, args, future = self._held.popleft()
            if future.set_running_or_notify_cancel():
                _chain(self._submit(job, *args), future)

    def _submit(self, job: Callable[..., Any], *args: Any) -> Future:
        """The executor's submit, which starts a worker when none is idle: begun with Ctrl-C ignored, a worker
        still starting (before `_start_worker`) cannot be stopped by a terminal's Ctrl-C with a traceback."""
        from monitor.store.consolidation_fits import children_ignore_ctrl_c

        with children_ignore_ctrl_c():
            return self._pool.submit(job, *args)

    def all_handed_out(self) -> None:
        """No more files to hand out (or none at all): held jobs may start."""
        self._handing_out = False
        self._release()

    def _started(self) -> None:
        """Wait until every worker has started (or failed to). A worker still starting reads the pool's lock,
        events and barrier from this process, and they vanish with the pool once it is shut down without
        waiting: the worker would end on a traceback printed after the command's own last line."""
        wait(self._starting, timeout=STARTING_S)

    def stop(self) -> None:
        """Cancel: jobs not started are dropped, a file under way rolls back, running fits stop at their next
        check (nothing saved)."""
        self._started()
        self.cancel.set()
        self.halted.set()
        while self._held:
            self._held.popleft()[2].cancel()
        self._pool.shutdown(wait=False, cancel_futures=True)

    def __enter__(self) -> ImportPool:
        return self

    def __exit__(self, *exc: object) -> None:
        self._started()
        if exc[0] is not None:
            self.stop()
        self._pool.shutdown(wait=True, cancel_futures=exc[0] is not None)
        for key, value in self._saved.items():
            if value is None:
                os.environ.pop(key, None)
            else:
                os.environ[key] = value


def _chain(source: Future, target: Future) -> None:
    """Hand `source`'s outcome to `target` when it comes."""
    def copy(done: Future) -> None:
        if done.cancelled():
            target.set_exception(CancelledError())
        elif done.exception() is not None:
            target.set_exception(done.exception())
        else:
            target.set_result(done.result())

    source.add_done_callback(copy)
