"""NWB export: one file per stored session (the optional `nwb` extra: h5py writes, pynwb gives the schema).

Rule: each session's content (monitor.store.nwb_content: names, subject,
session, trials, events) is written by monitor.store.nwb_file under a
temporary twin of its own (monitor.store.twins) and renamed when complete, so
a file of that name is always whole, also when two exports write it at once.
One failed session is reported and the others are written. Sessions are
written side by side in spawned processes (one per core when there are
enough), each with its own read-only connection, while this process writes
the schema file they copy; Ctrl-C lets the files under way finish, starts no
other, and the result names the files written.
"""

from __future__ import annotations

import os
import sqlite3
import tempfile
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Iterable, Iterator

from monitor.store.animals import get_animal, missing_fields
from monitor.store.connection import database_path
from monitor.store.consolidation_fits import worker_count
from monitor.store.nwb_content import file_name, session_content, subject_label
from monitor.store.nwb_file import write, write_schema_file
from monitor.store.twins import twin

SCHEMA_WAIT_S = 120.0  # a worker waits this long at most for the schema file (importing pynwb takes seconds)
SESSIONS_PER_WORKER = 8  # a spawned writer costs about as much to start as eight sessions take to write


class Stopped(Exception):
    """Raised by a progress callback to stop the export between files (the window's Cancel, a first Ctrl-C)."""


@dataclass
class ExportResult:
    """What an export wrote, what it could not, and what it warns about (one line each)."""

    written: list[Path] = field(default_factory=list)
    failed: list[str] = field(default_factory=list)
    warnings: list[str] = field(default_factory=list)
    interrupted: bool = False  # Ctrl-C or Stopped: the sessions neither written nor failed were not started


def write_session(conn: sqlite3.Connection, session_id: int, number: int, out_dir: Path, schema: Path,
                  settings: dict | None = None) -> Path:
    """Write session `session_id` (the animal's `number`-th) into `out_dir`; return the file's path.

    `schema`: a file of `nwb_file.write_schema_file`, whose specifications the new file carries."""
    animal, content = session_content(conn, session_id, number, settings)
    path = out_dir / file_name(animal, number)
    _wait_for(schema)
    part = twin(path)
    try:
        write(content, part, schema)
        os.replace(part, path)
    finally:
        part.unlink(missing_ok=True)
    return path


def _wait_for(schema: Path) -> None:
    """Wait until `schema` exists: the exporting process writes it while its workers start."""
    deadline = time.monotonic() + SCHEMA_WAIT_S
    while not schema.exists():
        if not schema.parent.exists() or time.monotonic() > deadline:
            raise FileNotFoundError(f"no NWB schema file {schema.name}: the export was stopped")
        time.sleep(0.01)


def _write_schema(schema: Path) -> None:
    """The schema file, under its name only when whole."""
    part = schema.with_name("partial-" + schema.name)
    write_schema_file(part)
    os.replace(part, schema)


def export_nwb(conn: sqlite3.Connection, out_dir: Path, settings: dict | None = None,
               progress: Callable[[int, int, Path], None] | None = None, workers: int | None = None) -> ExportResult:
    """Write one NWB file per session into `out_dir`; a failed session is listed and the rest written.

    Sessions are written side by side in spawned processes (`workers`; default: one per core when there are
    at least SESSIONS_PER_WORKER sessions a process); `progress(done, total, path)` runs here, per file."""
    sessions = conn.execute("SELECT id, animal FROM sessions ORDER BY animal, started_at, id").fetchall()
    out_dir.mkdir(parents=True, exist_ok=True)
    result = ExportResult()
    counts: dict[str, int] = {}
    for animal in sorted({a for _, a in sessions}):
        missing = missing_fields(get_animal(conn, animal))
        if missing:
            result.warnings.append(f"{animal}: subject record lacks {', '.join(missing)} "
                                   f"(exported without; add with `rigside animal edit {animal} ...`)")
    labels: dict[str, str] = {}
    tasks: list[tuple[int, int, str]] = []
    for session_id, animal in sessions:
        counts[animal] = counts.get(animal, 0) + 1
        first = labels.setdefault(subject_label(animal), animal)
        if first != animal:
            result.failed.append(f"{animal} session {counts[animal]} (its file name would be {first}'s: "
                                 f"sub-{subject_label(animal)}; rename one of them)")
            continue
        tasks.append((session_id, counts[animal], animal))
    database = database_path(conn)
    if workers is None:
        workers = worker_count(len(tasks) // SESSIONS_PER_WORKER)
    with tempfile.TemporaryDirectory(prefix="rigside-nwb-") as folder:
        schema = Path(folder) / "schema.nwb"
        try:
            if workers <= 1 or database is None:
                _write_schema(schema)
                outcomes = (_written(conn, task, out_dir, schema, settings) for task in tasks)
                _collect(outcomes, tasks, len(sessions), result, progress)
            else:
                _in_processes(database, tasks, out_dir, schema, settings, workers, len(sessions), result, progress)
        except (KeyboardInterrupt, Stopped):  # the files written are whole; the command names them
            result.interrupted = True
    result.written.sort()
    result.failed.sort()
    return result


def _written(conn: sqlite3.Connection, task: tuple[int, int, str], out_dir: Path, schema: Path,
             settings: dict | None) -> tuple[Path | None, str | None]:
    """(the file written, None), or (None, the session's failure in one line): one session's fault must not
    stop the others."""
    session_id, number, animal = task
    try:
        return write_session(conn, session_id, number, out_dir, schema, settings), None
    except Exception as exc:  # noqa: BLE001 - reported, and the other sessions written
        return None, (f"{animal} session {number} ({type(exc).__name__}: "
                      f"{str(exc).splitlines()[0] if str(exc) else ''})")


def _collect(outcomes: Iterable[tuple[Path | None, str | None]], tasks: list, total: int, result: ExportResult,
             progress: Callable[[int, int, Path], None] | None) -> None:
    done = len(result.written) + len(result.failed)  # sessions refused (in failed) or collected count as done
    for path, failure in outcomes:
        done += 1
        if path is None:
            result.failed.append(failure or "")
            continue
        result.written.append(path)
        if progress is not None:
            progress(done, total, path)


def _naming_only(progress: Callable[[int, int, Path], None] | None) -> Callable[[int, int, Path], None] | None:
    """`progress` for the files finished after a stop: each is named, a second stop is not raised."""
    if progress is None:
        return None

    def named(done: int, total: int, path: Path) -> None:
        try:
            progress(done, total, path)
        except Stopped:
            pass
    return named


_WORKER: dict[str, Any] = {}  # a worker process's own read-only connection


def _start_worker(database: Path) -> None:
    import signal

    from monitor.store.db import open_store
    from monitor.store.orphans import end_with_parent

    end_with_parent()
    signal.signal(signal.SIGINT, signal.SIG_IGN)  # Ctrl-C is the parent's: it lets the files under way finish
    _WORKER["conn"] = open_store(database, readonly=True)


def _worker_task(task: tuple[int, int, str], out_dir: Path, schema: Path,
                 settings: dict | None) -> tuple[Path | None, str | None]:
    return _written(_WORKER["conn"], task, out_dir, schema, settings)


def _in_processes(database: Path, tasks: list, out_dir: Path, schema: Path, settings: dict | None, workers: int,
                  total: int, result: ExportResult, progress: Callable[[int, int, Path], None] | None) -> None:
    """Write `tasks` in `workers` spawned processes, each with its own read-only connection; on Ctrl-C the files
    under way are finished, the rest not started."""
    import multiprocessing
    from concurrent.futures import ProcessPoolExecutor, as_completed

    pool = ProcessPoolExecutor(max_workers=workers, mp_context=multiprocessing.get_context("spawn"),
                               initializer=_start_worker, initargs=(database,))
    futures = [pool.submit(_worker_task, task, out_dir, schema, settings) for task in tasks]
    try:
        _write_schema(schema)  # while the workers start and read their first sessions
    except BaseException:
        pool.shutdown(wait=False, cancel_futures=True)  # the workers give up when the schema's folder goes
        raise
    collected: set[Any] = set()

    def outcomes() -> Iterator[tuple[Path | None, str | None]]:
        for future in as_completed(futures):
            collected.add(future)
            yield future.result()

    try:
        _collect(outcomes(), tasks, total, result, progress)
    except (KeyboardInterrupt, Stopped):
        pool.shutdown(wait=True, cancel_futures=True)  # the files under way are finished...
        _collect((f.result() for f in futures if f.done() and not f.cancelled() and f not in collected), tasks,
                 total, result, _naming_only(progress))  # ...and named with the others
        raise
    finally:
        pool.shutdown(wait=True, cancel_futures=True)
