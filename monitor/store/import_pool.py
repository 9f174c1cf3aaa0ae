"""Worker processes beside an import: files parsed ahead, animals refitted meanwhile.

Rule: the importing process stores the files in the order given, each in its
own transaction; the workers (spawned, as many as asked, each with one BLAS
thread, Ctrl-C ignored from their start: the importing process handles it and
cancels them)
parse the files ahead of it, at most `LOOKAHEAD_BYTES` of files at a time so
memory stays bounded. While they start, the importing process does the work
of its own it was given (`meanwhile`), then parses the first file itself.
Whenever the next file's result is not ready, it parses the last file handed
out that no worker has taken yet instead of waiting (its result, or its
error, kept for that file's turn), so the two sides share the parsing when
the workers are the slower. As soon as an animal's last file is stored
(`Finished` tells which), its consolidation model can be refitted in a worker
(`refit_animal`, which saves its own fit in a short transaction), so fits run
while later files are still being imported. Until every file has been handed
to a worker, such jobs wait, so parsing never queues behind a fit. In the
workers, and in the importing process while it stores (`few_collections`),
Python's cyclic garbage collector runs rarely: the records and rows are
millions of young tuples in no cycle, and at the default threshold (a
collection per 700 new objects, a full one now and then) collecting took
about a tenth of each process's time. While the pool runs, the importing
process's threads take turns every millisecond instead of Python's 5 ms: a
parsed file comes back through the executor's thread in 64 kB pieces while
the worker waits, and at 5 ms turns the worker sat idle a quarter of the
time."""

from __future__ import annotations

import gc
import multiprocessing
import os
import signal
import sys
from collections import Counter, deque
from collections.abc import Callable, Iterable, Iterator, Sequence
from contextlib import contextmanager
from concurrent.futures import CancelledError, Future, ProcessPoolExecutor
from pathlib import Path
from typing import Any, NamedTuple

from monitor.store.orphans import end_with_parent

LOOKAHEAD_BYTES = 64_000_000  # files parsed ahead of the one being stored (the parsed rows take ~10x this)
# while the pool runs, this process's busy thread hands the interpreter lock over this often (Python's
# default: every 5 ms): a worker's parsed file comes back through the executor's thread here, 64 kB of pipe
# at a time, and the worker waits until that thread has read it
HANDOFF_SWITCH_S = 0.001
FEW_COLLECTIONS = 1_000_000  # new objects between two collections of the youngest generation (Python's default: 700)

_cancelled: Any = None  # in a worker: the pool's cancel event


def _start_worker(cancel: Any) -> None:
    """A worker's first step: it ends with the importing process (monitor.store.orphans); Ctrl-C is the importing
    process's to handle; remember the cancel event; collect garbage rarely."""
    global _cancelled
    end_with_parent()
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    _cancelled = cancel
    gc.set_threshold(FEW_COLLECTIONS, *gc.get_threshold()[1:])


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
    """Spawned worker processes for one import (a context manager: it ends them)."""

    def __init__(self, workers: int) -> None:
        from monitor.store.consolidation_fits import ONE_CORE

        context = multiprocessing.get_context("spawn")
        self.cancel = context.Event()
        self._saved = {key: os.environ.get(key) for key in ONE_CORE}
        os.environ.update(ONE_CORE)  # read by each worker's interpreter as it starts, before numpy loads
        self._pool = ProcessPoolExecutor(max_workers=workers, mp_context=context, initializer=_start_worker,
                                         initargs=(self.cancel,))
        self._held: deque[tuple[Callable[..., Any], tuple, Future]] = deque()
        self._parsing = True
        self._switch_interval = sys.getswitchinterval()
        sys.setswitchinterval(HANDOFF_SWITCH_S)

    def parse_all(self, parse: Callable[..., Any], contents: Sequence[tuple[Path, bytes]],
                  options: dict[str, Any], meanwhile: Callable[[], None] | None = None) -> Iterator[Any]:
        """`parse(path, data, **options)` of every file, in order, parsed in the workers ahead of the caller
        (the first one here, while the workers start; later ones here too while the next is not ready);
        `meanwhile` is this process's own work, done first, once the files are handed out."""
        pending: deque[_Handed] = deque()
        state = {"submitted": 1, "ahead": 0}  # files handed out (the first is parsed here), their bytes

        def top_up() -> None:
            """Hand files to the workers up to the look-ahead bound; once all are handed out, held jobs go."""
            while state["submitted"] < len(contents) and (state["ahead"] <= LOOKAHEAD_BYTES or not pending):
                path, data = contents[state["submitted"]]
                pending.append(_Handed(self._submit(parse, path, data, **options), state["submitted"],
                                       len(data)))
                state["submitted"] += 1
                state["ahead"] += len(data)
            if state["submitted"] >= len(contents) and self._parsing:
                self.done_parsing()

        try:
            top_up()
            if meanwhile is not None:
                meanwhile()
            for path, data in contents[:1]:
                yield parse(path, data, **options)
            while pending:
                while not pending[0].future.done() and _parse_one_here(parse, contents, options, pending):
                    pass
                handed = pending.popleft()
                state["ahead"] -= handed.size
                top_up()
                yield handed.future.result()
        finally:
            for handed in pending:
                handed.future.cancel()

    def submit(self, job: Callable[..., Any], *args: Any) -> Future:
        """Run `job(*args)` in a worker once every file has been handed out for parsing."""
        if not self._parsing:
            return self._submit(job, *args)
        future: Future = Future()
        self._held.append((job, args, future))
        return future

    def _release(self) -> None:
        while self._held:
            job, args, future = self._held.popleft()
            if future.set_running_or_notify_cancel():
                _chain(self._submit(job, *args), future)

    def _submit(self, job: Callable[..., Any], *args: Any, **kwargs: Any) -> Future:
        """The executor's submit, which starts a worker when none is idle: begun with Ctrl-C ignored, a worker
        still starting (before `_start_worker`) cannot be stopped by a terminal's Ctrl-C with a traceback."""
        from monitor.store.consolidation_fits import children_ignore_ctrl_c

        with children_ignore_ctrl_c():
            return self._pool.submit(job, *args, **kwargs)

    def done_parsing(self) -> None:
        """No more files to parse (a single file, or parsed here): held jobs may start."""
        self._parsing = False
        self._release()

    def stop(self) -> None:
        """Cancel: jobs not started are dropped, running fits stop at their next check (nothing saved)."""
        self.cancel.set()
        while self._held:
            self._held.popleft()[2].cancel()
        self._pool.shutdown(wait=False, cancel_futures=True)

    def __enter__(self) -> ImportPool:
        return self

    def __exit__(self, *exc: object) -> None:
        if exc[0] is not None:
            self.stop()
        self._pool.shutdown(wait=True, cancel_futures=exc[0] is not None)
        sys.setswitchinterval(self._switch_interval)
        for key, value in self._saved.items():
            if value is None:
                os.environ.pop(key, None)
            else:
                os.environ[key] = value


class _Handed(NamedTuple):
    """A file handed out for parsing: its future, its place in the files, its size; `here` once this process
    took it back."""

    future: Future
    index: int
    size: int
    here: bool = False


def _parse_one_here(parse: Callable[..., Any], contents: Sequence[tuple[Path, bytes]], options: dict[str, Any],
                    pending: deque[_Handed]) -> bool:
    """Parse in this process the last file of `pending` no worker has taken (its future cancelled), keeping its
    result or error in its place; False when the workers have taken every one."""
    for i in range(len(pending) - 1, -1, -1):
        handed = pending[i]
        if handed.here:
            continue
        if not handed.future.cancel():
            return False  # taken by a worker: so were the files before it (they are taken in order)
        here: Future = Future()
        path, data = contents[handed.index]
        try:
            here.set_result(parse(path, data, **options))
        except Exception as exc:  # noqa: BLE001 - raised at the file's turn, as a worker's error would be
            here.set_exception(exc)
        pending[i] = _Handed(here, handed.index, handed.size, True)
        return True
    return False


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
