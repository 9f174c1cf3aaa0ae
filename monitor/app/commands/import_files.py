"""`rigside import FILE... [--animal NAME] --protocol FILE [--mapping FILE] --db DB`.

Rule: every file is checked before anything is stored: each must be readable,
and none may have been imported before (the same bytes, by SHA-256, under
any name), be a log file recorded live (or a copy of one:
monitor.store.importer.recorded_live) or be given twice; otherwise one line
names the file and exit 2. With `--skip-imported` such files are skipped
instead, each named on stderr, so an interrupted import resumes with the same
command (a file that another process imports meanwhile is skipped too; without
the option that ends the command, naming how many files it had imported); the
animals of skipped files whose model is not fitted to their data as they are
now (`Imported.unfitted`: an earlier import stopped during its fits, or ran
with `--no-fit`) are fitted too, unless `--no-fit`.
Then each file is stored in its own `BEGIN IMMEDIATE` transaction (all of a
file or none of it) with its trials derived; a file that grew since an earlier
import of it (imported while still being written) supersedes that import's
sessions in the same transaction (excluded and logged:
monitor.store.importer.supersede). Files adding up to 1 MB or more are read,
split, turned into rows, their trials derived and stored by worker processes
(`--jobs`, one per core; monitor.store.import_pool), each file whole in its
own transaction, about in the order given; they start while the files are
checked. While another process holds the write lock the import waits up to
`--wait` seconds instead of failing. As soon as an animal's last file is
stored, its report entry is built once here (from one snapshot, outside any
write) and kept, and (unless `--no-fit`) its consolidation model is
refitted in a worker process (one per core, one BLAS thread each) and cached
(monitor.store.consolidation_fits), so fits run while later files are still
being imported; one stderr line per animal at the end.
One progress line per file goes to stderr (`[3/240] alder_s03.rsw: 1
session, 5123 events, 0 malformed, 402 attempts`) below a progress bar on a terminal
(not with `--quiet`), a summary line to stdout. `import_files` is the work
both this command and the window's File > Import run (a `Tracker` counts
files and animals fitted and asks whether to stop): asked to stop (Ctrl-C,
the window's Cancel) it begins no other file, finishes those being stored and
stops, naming how far it got (exit 130); a second Ctrl-C rolls those back; during the fits
it abandons the fits under way (every file stays imported).
Sessions, animals and times: monitor.store.importer and docs/store.md.
"""

from __future__ import annotations

import argparse
import os
import sys
import time
from concurrent.futures import Future
from contextlib import ExitStack, nullcontext
from pathlib import Path
from typing import Any, NamedTuple

from monitor.app.errors import UsageError
from monitor.app.paths import add_db_argument, resolve_db
from monitor.app.progress import Tracker

WAIT_S = 60.0
PARALLEL_BYTES = 1_000_000  # with --jobs 0, files adding up to less than this are stored by this process alone


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("files", nargs="+", type=Path, metavar="FILE", help="recorded files to import")
    parser.add_argument("--animal", help="the animal (default: the mapping's animal column, or NAME in NAME_sNN.rsw)")
    parser.add_argument("--protocol", required=True, type=Path, help="training protocol in force (TOML)")
    parser.add_argument("--mapping", type=Path, help="TOML mapping for a lab's own line format")
    add_db_argument(parser)
    parser.add_argument("--gap-hours", type=float, default=2.0,
                        help="a pause longer than this starts a new session (default 2)")
    parser.add_argument("--wait", type=float, default=WAIT_S,
                        help=f"seconds to wait while another process writes the database (default {WAIT_S:g})")
    parser.add_argument("--no-fit", action="store_true",
                        help="skip refitting the consolidation model (the report then says \"not fitted\")")
    parser.add_argument("--jobs", type=int, default=0,
                        help="processes that read and store files side by side (default 0: one per core when "
                             "there are two or more and the files add up to 1 MB or more, else this process alone; "
                             "1: this process alone)")
    parser.add_argument("--quiet", action="store_true", help="no progress bar")
    parser.add_argument("--skip-imported", action="store_true",
                        help="skip files already imported (named on stderr) instead of refusing the whole command; "
                             "resumes an interrupted import")


class Imported(NamedTuple):
    """What `import_files` did: files imported of those given, what they held, and whether it was stopped."""

    files: int
    imported: int
    skipped: list[Path]
    sessions: int
    events: int
    malformed: int
    trials: int
    animals: list[str]
    last: str | None
    seconds: float
    stopped: bool
    fitted: int = 0            # animals whose model was refitted during the import
    fits_stopped: bool = False  # asked to stop while fitting: every file imported, some fits abandoned
    unfitted: tuple[str, ...] = ()  # animals of skipped files whose model is not fitted to their data as they are
    superseded: int = 0  # sessions of earlier imports of files that grew since, now excluded

    @property
    def fit_targets(self) -> list[str]:
        """The animals a fitting import fits: those whose files it stored and those of `unfitted`."""
        return sorted(set(self.animals) | set(self.unfitted))

    def summary(self) -> str:
        """The closing line: the counts, or (stopped) how far it got and how to finish."""
        if self.stopped:
            last = f" (the last: {self.last})" if self.last else ""
            return (f"interrupted: {self.imported} of {self.files} files imported{last}; the other "
                    f"{self.files - self.imported} were not touched and are imported by the same command with "
                    "--skip-imported")
        superseded = f", {_n(self.superseded, 'earlier session')} superseded" if self.superseded else ""
        return (f"imported {self.imported} files: {_n(self.sessions, 'session')}, {self.events} events, "
                f"{self.malformed} malformed lines, {self.trials} attempts (trials, lone, premature, omitted)"
                f"{superseded} in {self.seconds:.1f} s")


def run(args: argparse.Namespace) -> int:
    from monitor.app.progress import INTERRUPTED, Progress

    with Progress(quiet=args.quiet) as progress:
        result = import_files(resolve_db(args.db), args.files, args.protocol, progress, animal=args.animal,
                              mapping_path=args.mapping, gap_hours=args.gap_hours, wait=args.wait, jobs=args.jobs,
                              skip_imported=args.skip_imported, fit=not args.no_fit)
        if result.stopped:
            print(result.summary(), file=sys.stderr)
            return INTERRUPTED
    if result.skipped:
        print(f"skipped {len(result.skipped)} already stored (imported, or recorded live)", file=sys.stderr)
    print(result.summary())
    if result.fits_stopped:
        print(f"interrupted while fitting: {result.fitted} of {len(result.fit_targets)} animals fitted; every file "
              "was imported; the same command with --skip-imported fits the others (the window refits them when "
              "their page opens)", file=sys.stderr)
        return INTERRUPTED
    return 0


def import_files(db: Path, files: list[Path], protocol_path: Path, tracker: Tracker, *, animal: str | None = None,
                 mapping_path: Path | None = None, gap_hours: float = 2.0, wait: float = WAIT_S, jobs: int = 0,
                 skip_imported: bool = False, fit: bool = False, operator: str | None = None) -> Imported:
    """Check and import `files` into the store at `db`, one transaction per file, counting files on `tracker`;
    with `fit`, each animal's model is refitted in a worker as soon as its files are stored.

    Bad input is a UsageError naming the option (nothing imported); asked to stop, it stops after the
    files being stored (a second Ctrl-C rolls them back) and says how far it got. A file that grew
    since an earlier import of it supersedes that import's sessions (excluded by `operator`, default
    this PC's user name, in the same transaction)."""
    from drivers.config import ConfigError

    from monitor.app.commands.record import _read_protocol
    from monitor.store.import_pool import ImportPool
    from monitor.store.importer import file_digest

    if not gap_hours > 0:
        raise UsageError(f"--gap-hours: must be above 0, got {gap_hours:g}")
    if not wait >= 0:
        raise UsageError(f"--wait: must be 0 or more, got {wait:g}")
    if jobs < 0:
        raise UsageError(f"--jobs: must be 0 (one per core) or more, got {jobs}")
    protocol = _read_protocol(protocol_path)
    mapping = mapping_text = None
    if mapping_path is not None:
        from drivers.mapping import parse_mapping

        try:
            mapping_text = mapping_path.read_text(encoding="utf-8")
            mapping = parse_mapping(mapping_text, str(mapping_path))
        except OSError as exc:
            raise UsageError(f"--mapping: cannot read {mapping_path} ({exc.strerror or exc})") from None
        except ConfigError as exc:
            raise UsageError(f"--mapping: {exc}") from None
    if animal is not None and not animal.strip():
        raise UsageError("--animal: must not be empty")

    contents: list[tuple[Path, bytes]] = []
    seen: dict[str, Path] = {}
    for path in files:
        try:
            data = path.read_bytes()
        except OSError as exc:
            raise UsageError(f"FILE: cannot read {path} ({exc.strerror or exc})") from None
        digest = file_digest(data)
        if digest in seen:
            raise UsageError(f"FILE: {path} has the same content as {seen[digest]}, given twice; nothing imported")
        seen[digest] = path
        contents.append((path, data))

    storers = _storers(contents, jobs)
    with ExitStack() as started_early:
        # the workers that store the files start while the files are checked
        early = started_early.enter_context(ImportPool(
            max(storers, _fit_workers(_holds(contents, animal, mapping))) if fit else storers)) if storers else None
        return _import_checked(db, contents, protocol, tracker, early, storers, animal=animal, mapping=mapping,
                               mapping_text=mapping_text, gap_hours=gap_hours, wait=wait,
                               skip_imported=skip_imported, fit=fit, operator=operator)


def _import_checked(db: Path, contents: list[tuple[Path, bytes]], protocol: dict[str, Any], tracker: Tracker,
                    early: Any, storers: int, *, animal: str | None, mapping: Any,
                    mapping_text: str | None, gap_hours: float, wait: float, skip_imported: bool, fit: bool,
                    operator: str | None) -> Imported:
    """`import_files` once its arguments are read: check the files against the store, then store them (in
    `storers` workers of the pool `early`, or here) and fit their animals."""
    import getpass
    import sqlite3
    from concurrent.futures import FIRST_COMPLETED
    from concurrent.futures import wait as first_of

    from drivers.config import ConfigError
    from monitor.store.db import StoreError, open_store
    from monitor.store.fits import has_current_fit
    from monitor.store.import_pool import Finished, ImportPool, few_collections, import_file, refit
    from monitor.store.importer import (Abandoned, AlreadyImported, ImportRefused, already_imported,
                                        animals_imported_from, commit_file, event_codes, file_digest, grown_from,
                                        parse_file, recorded_live, rig_calibrations)
    from monitor.store.reporting import load_libraries
    from monitor.store.source_locks import holder_of, resource_key

    try:
        conn = open_store(db, busy_timeout_ms=int(wait * 1000))
    except StoreError as exc:
        raise UsageError(f"--db: {exc}") from None
    imported = 0
    try:
        skipped = []
        of_skipped: set[str] = set()
        for path, data in contents:
            earlier = already_imported(conn, file_digest(data))
            if earlier is not None:
                if not skip_imported:
                    raise UsageError(f"FILE: {path} was already imported (same content as {earlier[0]}); "
                                     "nothing imported (--skip-imported imports the rest)")
                skipped.append(path)
                of_skipped.update(animals_imported_from(conn, file_digest(data)))
                tracker.say(f"skipped {path}: already imported (same content as {earlier[0]})")
                continue
            busy = holder_of(conn, resource_key("file", str(path)))
            if busy is not None:
                if not skip_imported:
                    raise UsageError(f"FILE: {busy}: importing it would store its events twice; nothing imported "
                                     "(--skip-imported skips it and imports the rest)")
                skipped.append(path)
                tracker.say(f"skipped {path}: {busy}")
                continue
            live = recorded_live(conn, data)
            if live is not None:
                where = (f"recorded live from file:{live.source}" + (f" (rig {live.rig})" if live.rig else "")
                         + f", {live.recorded_bytes} of its {len(data)} bytes, {_n(len(live.sessions), 'session')}")
                rest = (f"; `rigside record --source file:{live.source}` takes up the rest"
                        if live.recorded_bytes < len(data) else "")
                if not skip_imported:
                    raise UsageError(f"FILE: {path} was {where}: importing it would store those events twice; "
                                     f"nothing imported{rest} (--skip-imported skips it and imports the rest)")
                skipped.append(path)
                of_skipped.update(live.animals)
                tracker.say(f"skipped {path}: {where}{rest}")
        contents = [(path, data) for path, data in contents if path not in skipped]
        grown: dict[Path, list] = {}  # files that grew since an earlier import of them: the earlier imports
        for path, data in contents:
            earlier = grown_from(conn, path, data)
            if any(e.sessions for e in earlier):
                grown[path] = earlier
        who = operator or getpass.getuser()
        superseded = 0
        # an earlier import stopped before their fits ended (or ran without them): this one fits them
        unfitted = tuple(name for name in sorted(of_skipped) if not has_current_fit(conn, name))
        started = time.monotonic()
        totals = [0, 0, 0, 0]
        animals: set[str] = set()
        parse_options = {"protocol_text": protocol["text"], "animal": animal, "mapping": mapping,
                         "gap_s": gap_hours * 3600.0, "calibrations": rig_calibrations(conn),
                         "codes": event_codes(conn)}
        store_options = {"protocol_text": protocol["text"], "protocol_name": protocol["name"],
                         "protocol_version": protocol["version"], "mapping_text": mapping_text}
        holds = _holds(contents, animal, mapping)
        workers = max(storers, _fit_workers([*holds, *unfitted])) if fit else storers
        finished = Finished(holds)
        fits: dict[str, Future] = {}
        fitted, fits_stopped = 0, False
        interrupted = False
        refused: tuple[Path, str] | None = None  # a file imported or recorded meanwhile, how (no --skip-imported)
        last: str | None = None
        done = 0  # files stored or skipped so far
        untold: list[str] = []  # animals finished while the import was stopping: their entries come at the end
        tracker.begin(len(contents), "file", "importing")
        with few_collections(), (nullcontext(early) if early is not None
                                 else ImportPool(workers) if workers else nullcontext(None)) as pool:

            def ready(names: list[str]) -> None:
                """The animals' files are all stored: refit them beside, and build their report entries here
                (the workers go on with the next files meanwhile)."""
                animals.update(names)
                for name in names:
                    if pool is not None and fit:
                        fits[name] = pool.submit(refit, str(db), name)
                for name in names:
                    _refresh_entry(conn, name, None if pool is None else pool.writing)

            def stored(index: int, result: Any, replaced: int) -> list[str]:
                """File `index` was stored: count and name it; the animals whose files are now all stored."""
                nonlocal imported, last, superseded, done
                path = contents[index][0]
                imported += 1
                done += 1
                last = path.name
                tracker.advance()
                for i, value in enumerate((result.sessions, result.events, result.malformed, result.trials)):
                    totals[i] += value
                tracker.say(f"[{done}/{len(contents)}] {path.name}: {_n(result.sessions, 'session')}, "
                            f"{result.events} events, {result.malformed} malformed, {result.trials} attempts")
                for notice in result.notices:
                    tracker.say(f"  {path.name}: {notice}")
                if replaced:
                    superseded += replaced
                    tracker.say(f"  {path.name}: the file grew after an earlier import of it (imported while "
                                f"still being written): {_n(replaced, 'earlier session')} of it now excluded as "
                                "superseded, kept in the store (the window can count them again)")
                return finished.stored(holds[index], result.animals)

            def imported_meanwhile(index: int, exc: AlreadyImported) -> list[str]:
                """File `index` was imported meanwhile by another process (or a recorder began to follow it):
                skipped with --skip-imported (the animals now finished), else the import stops (`refused`)."""
                nonlocal refused, done
                path = contents[index][0]
                if not skip_imported:
                    refused = refused or (path, exc.meanwhile)
                    return []
                skipped.append(path)
                done += 1
                tracker.advance()
                tracker.say(f"[{done}/{len(contents)}] skipped {path.name}: {exc.meanwhile}")
                return finished.stored(holds[index], [])

            def taken(index: int, future: Future) -> list[str]:
                """What a worker did with file `index`: the animals now finished (none when it was not stored)."""
                if future.cancelled():
                    return []
                try:
                    result, replaced = future.result()
                except Abandoned:
                    return []
                except AlreadyImported as exc:
                    return imported_meanwhile(index, exc)
                return stored(index, result, replaced)

            try:
                if pool is None or not storers:  # this process reads and stores the files, in the order given
                    if pool is not None:
                        pool.all_handed_out()
                    for index, (path, data) in enumerate(contents):
                        if tracker.cancelled():
                            interrupted = True
                            break
                        parsed = parse_file(path, data, **parse_options)
                        try:
                            result, replaced = commit_file(conn, parsed, grown.get(path, []), who, **store_options)
                        except AlreadyImported as exc:
                            ready(imported_meanwhile(index, exc))
                            if refused is not None:
                                break
                            continue
                        ready(stored(index, result, replaced))
                else:  # the workers read and store them; this process builds the report entries
                    remaining = pool.hand_out(import_file, [
                        (str(db), int(wait * 1000), path, data, parse_options, store_options, grown.get(path, []),
                         who) for path, data in contents])
                    load_libraries()  # what the entries need, while the workers start
                    try:
                        while remaining:
                            if not (interrupted or refused) and tracker.cancelled():
                                interrupted = True
                            if interrupted or refused:
                                pool.halt(remaining)  # the files under way finish, no other begins
                                _drop_cancelled(remaining)
                            ended, _ = first_of(remaining, timeout=0.2, return_when=FIRST_COMPLETED)
                            for future in sorted(ended, key=remaining.get):
                                names = taken(remaining.pop(future), future)
                                if interrupted or refused:
                                    untold.extend(names)
                                else:
                                    ready(names)
                    except KeyboardInterrupt:  # a second Ctrl-C: the files under way roll back
                        pool.stop()
                        untold.extend(_drain(remaining, taken))
                        raise
                    except Exception:  # the files under way finish first, so that the message counts them
                        pool.halt(remaining)
                        untold.extend(_drain(remaining, taken))
                        raise
            except KeyboardInterrupt:  # a second Ctrl-C: the files being stored were rolled back, the finished stay
                interrupted = True
            if refused is not None:
                raise UsageError(f"FILE: {refused[0]} was {refused[1]}; {imported} of "
                                 f"{len(contents)} files imported, the rest not (the same command with "
                                 "--skip-imported imports them)")
            if interrupted:
                fits.clear()
                if pool is not None:
                    pool.stop()
                ready_entries = sorted({*untold, *finished.rest()})  # the stored animals' report entries stay current
                animals.update(ready_entries)
                for name in ready_entries:
                    _refresh_entry(conn, name)
            else:
                ready(finished.rest())
                for name in unfitted:
                    if pool is not None and fit and name not in fits:
                        fits[name] = pool.submit(refit, str(db), name)
                if fits:
                    fitted, fits_stopped = _collect_fits(fits, workers, tracker, pool, early=bool(animals))
    except ImportRefused as exc:
        raise UsageError(f"FILE: {exc}") from None
    except ConfigError as exc:
        raise UsageError(f"--mapping: {exc}") from None
    except sqlite3.OperationalError as exc:
        waited = f"waited {wait:g} s; " if "locked" in str(exc) or "busy" in str(exc) else ""
        raise UsageError(f"--db: {db}: {exc} ({waited}{imported} of {len(contents)} files "
                         "imported, the rest not: run the same command with --skip-imported to import them)") from None
    finally:
        conn.close()
    return Imported(len(contents), imported, skipped, *totals, sorted(animals), last, time.monotonic() - started,
                    interrupted, fitted, fits_stopped, unfitted, superseded)


def _holds(contents: list[tuple[Path, bytes]], animal: str | None, mapping: Any) -> list[str | None]:
    """The animal each file holds (`Finished`): --animal, else NAME of NAME_sNN; None for a mapped file with an
    animal column (any animal)."""
    from monitor.store.importer import animal_from_file_name

    return [None if mapping is not None and "animal" in mapping.columns
            else animal or animal_from_file_name(path) for path, _ in contents]


def _storers(contents: list[tuple[Path, bytes]], jobs: int) -> int:
    """Worker processes that read and store the files (0: this process does): `--jobs` when above 1, or with
    0 one per core when there are two or more and the files add up to 1 MB or more (a worker costs about a
    third of a second to start: two were as fast as this process alone at 0.5 MB, 10 % faster at 1 MB, 18 %
    at 2 MB); never more than the files."""
    if jobs == 0:
        if sum(len(data) for _, data in contents) < PARALLEL_BYTES or _cores() < 2:
            return 0
        return min(_cores(), len(contents))
    return 0 if jobs == 1 else min(jobs, len(contents))


def _drop_cancelled(remaining: dict[Future, int]) -> None:
    """Forget the files whose job was cancelled before a worker took it: not stored. (`wait` would never
    return them: a future cancelled by hand counts as done only once its executor has seen it, and one that
    is shutting down no longer looks.)"""
    for future in [f for f in remaining if f.cancelled()]:
        del remaining[future]


def _drain(remaining: dict[Future, int], taken: Any) -> list[str]:
    """Wait for the files under way after a stop (each finishes or rolls back), counting those stored through
    `taken`; the animals they finished. Another Ctrl-C meanwhile does not cut the wait short."""
    from concurrent.futures import wait

    names: list[str] = []
    while remaining:
        _drop_cancelled(remaining)
        try:
            ended, _ = wait(remaining, timeout=0.2)
        except KeyboardInterrupt:
            continue
        for future in sorted(ended, key=remaining.get):
            try:
                names.extend(taken(remaining.pop(future), future))
            except BaseException:  # noqa: BLE001 - the first error is the one reported, and a stored file is
                pass               # counted before its line is said (which another Ctrl-C may cut short)
    return names


def _cores() -> int:
    try:
        return len(os.sched_getaffinity(0))
    except AttributeError:  # not on Linux
        return os.cpu_count() or 1


def _refresh_entry(conn: Any, animal: str, writing: Any = None) -> None:
    """Build the animal's report entry from one snapshot, then keep it in a short transaction of its own
    (under `writing`, the import pool's lock, when workers store files meanwhile)."""
    from monitor.store.reporting import entry_with_fingerprint, keep_entry

    fingerprint, entry = entry_with_fingerprint(conn, animal)
    with writing if writing is not None else nullcontext():
        conn.execute("BEGIN IMMEDIATE")
        try:
            keep_entry(conn, animal, fingerprint, entry)
            conn.execute("COMMIT")
        except BaseException:
            if conn.in_transaction:
                conn.execute("ROLLBACK")
            raise


def _fit_workers(holds: list[str | None]) -> int:
    """Processes for the fits: one per core, no more than the animals (when the file names tell them)."""
    from monitor.store.consolidation_fits import worker_count

    return worker_count(len(holds) if None in holds else len(set(holds)))


def _collect_fits(fits: dict[str, Future], workers: int, tracker: Tracker, pool: Any,
                  early: bool) -> tuple[int, bool]:
    """Wait for the refits (`early`: some started as their animal's files were stored), a line per animal on
    `tracker`; asked to stop, the fits under way are abandoned. Return (animals fitted, stopped)."""
    from concurrent.futures import FIRST_COMPLETED, wait

    from monitor.core.consolidation.words import fraction_text

    tracker.say(f"fitting the consolidation model of {_n(len(fits), 'animal')} in {workers} separate "
                f"{'process' if workers == 1 else 'processes'} (one per core)"
                + (", started as each animal's files were stored" if early else ""))
    tracker.begin(len(fits), "animal", "fitting")
    waiting = {future: animal for animal, future in fits.items()}
    fitted = 0
    while waiting:
        if tracker.cancelled():
            pool.stop()
            return fitted, True
        done, _ = wait(waiting, timeout=0.2, return_when=FIRST_COMPLETED)
        for future in sorted(done, key=waiting.get):
            animal = waiting.pop(future)
            tracker.advance()
            try:
                block = future.result()
            except Exception as exc:  # noqa: BLE001 - one line per animal, the others go on
                tracker.say(f"fit {animal}: failed ({type(exc).__name__}: {exc}); the report says \"not fitted\"")
                continue
            if block is None:
                tracker.say(f"fit {animal}: failed (no result); the report says \"not fitted\"")
                continue
            fitted += 1
            figure = fraction_text(block["estimate"], block["low"], block["high"], block["status"])
            tracker.say(f"fit {animal}: slow-state fraction {figure} at session {block['session']}")
    return fitted, False


def refit_animals(db: Path, animals: list[str], tracker: Tracker) -> int:
    """Refit the imported animals in separate processes, one per core, counting animals on `tracker` (a line
    each); asked to stop, the fits under way are abandoned. Return how many were fitted."""
    from monitor.core.consolidation.words import fraction_text
    from monitor.store.consolidation_fits import refit_in_process, worker_count

    fitted = [0]

    def finished(animal: str, block: dict | None, error: str | None) -> None:
        tracker.advance()
        if block is None:
            tracker.say(f"fit {animal}: {'not done' if tracker.cancelled() else 'failed'} ({error or 'no result'}); "
                        "the report says \"not fitted\"")
            return
        fitted[0] += 1
        figure = fraction_text(block["estimate"], block["low"], block["high"], block["status"])
        tracker.say(f"fit {animal}: slow-state fraction {figure} at session {block['session']}")

    workers = worker_count(len(animals))
    tracker.say(f"fitting the consolidation model of {_n(len(animals), 'animal')} in {workers} separate "
                f"{'process' if workers == 1 else 'processes'} (one per core)")
    tracker.begin(len(animals), "animal", "fitting")
    refit_in_process(db, animals, cancel=tracker.cancelled, finished=finished, workers=workers)
    return fitted[0]


def _n(count: int, word: str) -> str:
    return f"{count} {word}" if count == 1 else f"{count} {word}s"
