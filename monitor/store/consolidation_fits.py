"""Consolidation fits from the store: one TrialSeries per animal, refitted in a separate process, cached.

Rule: an animal's series is its sessions as the report lists them (sessions
with a protocol text, by start then id; label = the report's index; a session
still being recorded is left out: a fit describes the end of a session), keeping
the completed final-stage trials of the latest session's protocol with a
finite interval: interval, target and rewarded (the rig's outcome) per
trial; per session the break = this session's start minus the previous
session's end in hours (23 h when unknown or not positive) and the excluded
flag. `refit_animal` fits it with `estimate_consolidation` from the cached
fit's `warm_start` and saves params (the warm start, whether the fit came from
it, and the live filter's
state after the last session with that session's end, so the window can
follow new trials without a refit), the report's consolidation block and its
trajectory with the data fingerprint taken before reading, so a fit of data
that changed meanwhile is stored as not current. A series with no
final-stage trial is saved as "too few trials" (estimate 0, interval
[0, 1]). `refit_in_process` runs the refits in spawned child processes (the
caller's interpreter stays free), as many as the PC has cores and no more than
the animals, each with one BLAS thread and taking the next animal from a shared
queue; it relays progress and passes cancel on (each save is its own
`BEGIN IMMEDIATE` transaction, so the children take turns at the store).
"""

from __future__ import annotations

import contextlib
import math
import multiprocessing
import os
import queue as queue_module
import signal
import sqlite3
import threading
from collections.abc import Callable, Iterable, Sequence
from pathlib import Path
from typing import Any

import numpy as np

from monitor.core.consolidation.model import TrialSeries
from monitor.core.session.trials import Trial
from monitor.store.fits import FINISHED
from monitor.store.orphans import end_with_parent

DEFAULT_BREAK_HOURS = 23.0
TOO_FEW = "too few trials"
# one BLAS thread in the fit's process: a second OpenBLAS thread only spins beside L-BFGS-B
# (1.78 s instead of 1.08 s for a cold refit over 30,000 trials, benchmarks/bench_refit.py)
ONE_CORE = {"OPENBLAS_NUM_THREADS": "1", "OMP_NUM_THREADS": "1", "MKL_NUM_THREADS": "1"}
Progress = Callable[[float, str], None]


def hours_between(end: float | None, start: float | None) -> float:
    """Break length in hours; DEFAULT_BREAK_HOURS when unknown or not positive."""
    if end is None or start is None or start <= end:
        return DEFAULT_BREAK_HOURS
    return (start - end) / 3600.0


def build_series(final_stage: str, sessions: Sequence[tuple[Sequence[Trial], float, bool]]) -> TrialSeries:
    """The final stage's completed trials of (trials, break_hours, excluded) per session; label = index from 1."""
    label, interval, target, rewarded = [], [], [], []
    for index, (trials, _, _) in enumerate(sessions, start=1):
        for t in trials:
            if t.completed and t.stage == final_stage and math.isfinite(t.interval_ms):
                label.append(index)
                interval.append(t.interval_ms)
                target.append(t.target_ms)
                rewarded.append(t.rewarded)
    used = sorted(set(label))
    breaks = np.array([sessions[i - 1][1] for i in used], float)
    excluded = np.array([sessions[i - 1][2] for i in used], bool)
    return TrialSeries.from_intervals(np.array(label, int), np.array(interval, float), np.array(target, float),
                                      np.array(rewarded, bool), breaks, excluded)


def store_series(conn: sqlite3.Connection, animal: str) -> tuple[TrialSeries, int, float | None]:
    """The animal's series from the store, its last report index (0 when it has no session) and when its last
    session ended (epoch seconds; None when unknown)."""
    from monitor.store.derive import derive, protocol_of, trials_by_session

    rows = conn.execute(
        "SELECT s.id, s.protocol_text, s.started_at, s.ended_at, s.excluded, b.session_id "
        "FROM sessions AS s LEFT JOIN trial_builds AS b ON b.session_id = s.id "
        f"WHERE s.animal = ? AND s.protocol_text IS NOT NULL AND {FINISHED} ORDER BY s.started_at, s.id",
        (animal,)).fetchall()
    if not rows:
        return build_series("", []), 0, None
    final = protocol_of(rows[-1][1]).final_stage.name
    trials = trials_by_session(conn, [r[0] for r in rows])
    sessions, previous_end = [], None
    for session_id, _, started, ended, excluded, built in rows:
        if built is None:  # recorded live, not derived yet: derive in memory
            fresh = derive(conn, session_id)
            trials[session_id] = fresh[0] if fresh is not None else []
        sessions.append((trials[session_id], hours_between(previous_end, started), bool(excluded)))
        previous_end = ended if ended is not None else previous_end
    return build_series(final, sessions), len(rows), previous_end


def too_few_block(last_session: int, n_trials: int) -> dict[str, Any]:
    return {"session": last_session, "estimate": 0.0, "low": 0.0, "high": 1.0, "status": TOO_FEW,
            "reason": f"{n_trials} final-stage trials: nothing to fit", "trajectory": [], "trials": n_trials}


def refit_animal(db: str | Path | sqlite3.Connection, animal: str, progress: Progress | None = None,
                 cancel: Callable[[], bool] | None = None) -> dict[str, Any] | None:
    """Refit one animal and save the fit; return its block (None when cancelled: nothing saved)."""
    from monitor.store.db import open_store
    from monitor.store.fits import data_fingerprint, latest_fit, save_fit

    conn = db if isinstance(db, sqlite3.Connection) else open_store(Path(db))
    try:
        fingerprint = data_fingerprint(conn, animal)
        series, last, last_end = store_series(conn, animal)
        cached = latest_fit(conn, animal)
        params: dict[str, Any] = {}
        if len(series.y) == 0:
            block = too_few_block(last, 0)
        else:
            from monitor.core.consolidation.analysis import consolidation_block, estimate_consolidation
            from monitor.core.consolidation.live import filter_state, live_filter

            warm = (cached or {}).get("params", {}).get("warm_start") or None
            result = estimate_consolidation(series, warm_start=warm, progress=progress, cancel=cancel)
            if result.status == "cancelled":
                return None
            block = consolidation_block(result)
            if block["session"] is None:   # no session estimated (e.g. too few trials): the last index
                block["session"] = last
            params = {"warm_start": result.warm_start, "evaluations": result.evaluations,
                      "from_cache": result.from_cache}
            live = live_filter(series, result)
            if live is not None:   # the filter at the end of the last session: new trials go on from here
                params["live"] = {**filter_state(live), "ended_at": last_end}
        in_transaction = conn.in_transaction
        if not in_transaction:
            conn.execute("BEGIN IMMEDIATE")
        try:
            save_fit(conn, animal, fingerprint=fingerprint, params=params, block=block,
                     sessions=block.get("trajectory", []))
            if not in_transaction:
                conn.execute("COMMIT")
        except BaseException:
            if not in_transaction and conn.in_transaction:
                conn.execute("ROLLBACK")
            raise
        return block
    finally:
        if conn is not db:
            conn.close()


@contextlib.contextmanager
def _environment(values: dict[str, str]):
    """Set environment variables for a child about to start; restore them after."""
    saved = {key: os.environ.get(key) for key in values}
    os.environ.update(values)
    try:
        yield
    finally:
        for key, value in saved.items():
            if value is None:
                os.environ.pop(key, None)
            else:
                os.environ[key] = value


@contextlib.contextmanager
def children_ignore_ctrl_c():
    """Children started inside begin with Ctrl-C ignored (an ignored signal stays ignored across the
    spawn, and Python then installs no handler of its own), so a terminal's Ctrl-C that comes while a
    child is still starting cannot stop it mid-import with a traceback. Only the main thread may change
    a handler: started from another thread (the window's jobs), a child ignores Ctrl-C from its first
    step instead (`_child`). A Ctrl-C in the few milliseconds of the start itself is lost to the caller."""
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    previous = signal.signal(signal.SIGINT, signal.SIG_IGN)
    try:
        yield
    finally:
        signal.signal(signal.SIGINT, previous)


def worker_count(animals: int, workers: int | None = None) -> int:
    """Processes for `animals` fits: `workers`, else this PC's cores (the ones this process may use); at most one
    per animal, at least one."""
    if workers is None:
        try:
            workers = len(os.sched_getaffinity(0))
        except AttributeError:  # not on Linux
            workers = os.cpu_count() or 1
    return max(1, min(workers, animals))


def _child(db_path: str, tasks: Any, out: Any, cancel: Any) -> None:
    """A child process: refit the animals it takes from `tasks` (None: no more), reporting
    ("progress"|"done"|"failed", animal, ...) on `out`. Ctrl-C is the parent's to handle (it passes cancel on):
    a terminal sends it to every process of its group, and a fit stopped by it here would only print a traceback.
    It ends with its parent (monitor.store.orphans)."""
    end_with_parent()
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    while True:
        animal = tasks.get()
        if animal is None or cancel.is_set():
            return
        try:
            block = refit_animal(db_path, animal, lambda f, m, a=animal: out.put(("progress", a, f, m)),
                                 cancel.is_set)
            out.put(("done", animal, block))
        except Exception as exc:  # noqa: BLE001 - reported to the parent, one line
            out.put(("failed", animal, f"{type(exc).__name__}: {exc}"))


def refit_in_process(db_path: str | Path, animals: Iterable[str],
                     progress: Callable[[str, float, str], None] | None = None,
                     cancel: Callable[[], bool] | None = None,
                     finished: Callable[[str, dict[str, Any] | None, str | None], None] | None = None,
                     workers: int | None = None) -> dict[str, dict[str, Any] | None]:
    """Refit `animals` in spawned processes (`worker_count`: one per core by default); {animal: block, or None
    when it failed or was cancelled}. `progress(animal, fraction, message)` and `finished(animal, block, error)`
    run in the caller."""
    names = list(animals)
    results: dict[str, dict[str, Any] | None] = {}
    if not names:
        return results
    context = multiprocessing.get_context("spawn")
    out, stop, tasks = context.Queue(), context.Event(), context.Queue()
    count = worker_count(len(names), workers)
    for animal in names + [None] * count:
        tasks.put(animal)
    children = [context.Process(target=_child, args=(str(db_path), tasks, out, stop), daemon=True,
                                name=f"consolidation fit {i + 1}") for i in range(count)]
    with _environment(ONE_CORE), children_ignore_ctrl_c():   # read by the spawned interpreters as they start
        for child in children:
            child.start()
    try:
        while len(results) < len(names):
            if cancel is not None and cancel():
                stop.set()
            try:
                message = out.get(timeout=0.1)
            except queue_module.Empty:
                if not any(child.is_alive() for child in children) and out.empty():
                    break
                continue
            kind, animal = message[0], message[1]
            if kind == "progress":
                if progress is not None:
                    progress(animal, message[2], message[3])
                continue
            block, error = (message[2], None) if kind == "done" else (None, message[2])
            results[animal] = block
            if finished is not None:
                finished(animal, block, error)
    finally:
        if stop.is_set() or len(results) < len(names):
            stop.set()
        for child in children:
            child.join(timeout=5)
            if child.is_alive():
                child.terminate()
                child.join()
    for animal in names:
        results.setdefault(animal, None)
    return results
