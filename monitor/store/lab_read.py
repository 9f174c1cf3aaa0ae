"""Reading the lab database through the local store's own code: a scratch SQLite copy of what is asked.

Rule: nothing here computes a figure. The rows a question needs (one lab
animal's sessions, trials, builds, fits, care entries and cached report
entry; or every PC's sessions and events; or one PC's decision and care
entries) are copied from the lab into a scratch store made by
`monitor.store.db.open_store` (every local migration, foreign keys off), and
the local modules answer it (reporting, the CSV export, the decision and care
chains' verify, the window's animal page), so a lab report equals the report
of a local store holding the same data. Identities: a PC's rows keep
their local ids when that PC is the first (lowest PC number) in the copy;
another PC's ids (sessions, animals, event rowids and every id pointing at
them) are shifted by PC number x 10^9. Unknown event codes, protocols and
rigs are matched by name. An animal is shown by its name, or `name@lab id`
when two lab animals share the name.
"""

from __future__ import annotations

import sqlite3
import tempfile
from collections import defaultdict
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Iterator

from monitor.store.derive import TRIAL_COLUMNS
from monitor.store.lab_schema import LabError, connect, require_current
from monitor.store.lab_sync import decode_value

ID_SHIFT = 10 ** 9
SCRATCH_NAME = "lab-copy.sqlite3"
_ID_COLUMNS = ("id", "session_id", "first_event", "last_event", "source_id", "import_id", "replaces")
_UNIQUE_BY_NAME = ("protocols", "rigs", "imports", "sources", "assignment_plans", "event_codes")
_NOT_COPIED = ("lab_sync", "lab_bookmarks", "file_offsets", "decisions", "raw_lines", "clock_samples")
_EVENT_SQL = ("SELECT rid, session_id, segment, line, t_us, raw_time, code, value, wall FROM events "
              "WHERE pc_id = %s AND session_id = ANY(%s) ORDER BY rid")
_TRIAL_COLUMNS = ("session_id", *TRIAL_COLUMNS)


@dataclass(frozen=True)
class LabAnimal:
    """A lab-wide animal: its shown name and where it lives (PC number -> local name)."""

    id: int
    name: str
    lab_id: str | None
    shown: str
    places: tuple[tuple[int, str], ...]


class Lab:
    """An open, current lab database (a context manager)."""

    def __init__(self, url: str) -> None:
        self.url = url
        self.pg = connect(url)
        try:
            require_current(self.pg, url)
        except BaseException:
            self.pg.close()
            raise

    def __enter__(self) -> "Lab":
        return self

    def __exit__(self, *exc: object) -> None:
        self.pg.close()

    # --- what the lab holds ---------------------------------------------------------------------

    def pcs(self) -> list[dict[str, Any]]:
        """Every PC: number, name, last sync (ISO 8601), animals, sessions, events it sent, rigs (named in its
        rig list or its sessions)."""
        rows = self.pg.execute(
            "SELECT p.id, p.name, p.last_sync, "
            "(SELECT count(*) FROM pc_animals AS m WHERE m.pc_id = p.id), "
            "(SELECT count(*) FROM records AS r WHERE r.pc_id = p.id AND r.tbl = 'sessions'), "
            "(SELECT coalesce(last_rowid, 0) FROM bookmarks AS b WHERE b.pc_id = p.id AND b.tbl = 'events'), "
            "(SELECT array_agg(DISTINCT coalesce(r.data->>'name', r.data->>'rig')) FROM records AS r "
            "WHERE r.pc_id = p.id AND r.tbl IN ('rigs', 'sessions')) "
            "FROM pcs AS p ORDER BY p.id").fetchall()
        return [{"pc": r[0], "name": r[1], "last_sync": None if r[2] is None else r[2].isoformat(),
                 "animals": r[3], "sessions": r[4], "events_up_to": r[5] or 0, "rigs": sorted(r[6] or [])}
                for r in rows]

    def animals(self) -> list[LabAnimal]:
        """Every lab animal, by shown name."""
        rows = self.pg.execute("SELECT a.id, a.name, a.lab_id, m.pc_id, m.local_name FROM animals AS a "
                               "JOIN pc_animals AS m ON m.animal_id = a.id ORDER BY a.id, m.pc_id").fetchall()
        places: dict[tuple[int, str, str | None], list[tuple[int, str]]] = defaultdict(list)
        for aid, name, lab_id, pc, local in rows:
            places[(aid, name, lab_id)].append((pc, local))
        counts: dict[str, int] = defaultdict(int)
        for _, name, _ in places:
            counts[name] += 1
        out = [LabAnimal(aid, name, lab_id, name if counts[name] == 1 else f"{name}@{lab_id}", tuple(where))
               for (aid, name, lab_id), where in places.items()]
        return sorted(out, key=lambda a: a.shown)

    # --- scratch copies ---------------------------------------------------------------------------

    def copy_animals(self, out: sqlite3.Connection, animals: list[LabAnimal], *, events: str = "unbuilt") -> None:
        """Copy these animals' rows into the scratch store `out`; events: 'unbuilt' (sessions without
        trials derived), 'latest' (those and each PC's latest session) or 'all'."""
        by_pc: dict[int, dict[str, str]] = defaultdict(dict)
        for animal in animals:
            for pc, local in animal.places:
                by_pc[pc][local] = animal.shown
        first = min(by_pc, default=0)
        out.execute("PRAGMA foreign_keys = OFF")
        out.execute("BEGIN")
        try:
            for pc in sorted(by_pc):
                _PcCopy(self.pg, out, pc, 0 if pc == first else pc * ID_SHIFT, by_pc[pc]).run(events)
            out.execute("COMMIT")
        except BaseException:
            out.execute("ROLLBACK")
            raise

    def entries_of(self, pc: int, tbl: str, out: sqlite3.Connection) -> int:
        """Copy one PC's chained entries ('decisions' or 'care_log'), ids and all, into the scratch store `out`
        (foreign keys off: the chain alone is checked); return how many."""
        rows = self.pg.execute("SELECT data FROM records WHERE pc_id = %s AND tbl = %s ORDER BY key::bigint",
                               (pc, tbl)).fetchall()
        columns = _columns(out, tbl)
        out.execute("PRAGMA foreign_keys = OFF")
        out.execute("BEGIN")
        for (data,) in rows:
            _insert(out, tbl, {k: decode_value(v) for k, v in data.items() if k in columns})
        out.execute("COMMIT")
        return len(rows)

    def local_animal(self, pc: int, animal_id: int) -> str | None:
        """The name a PC's store gives its animal `animal_id` (None: not in the lab)."""
        row = self.pg.execute("SELECT data->>'name' FROM records WHERE pc_id = %s AND tbl = 'animals' AND key = %s",
                              (pc, str(animal_id))).fetchone()
        return None if row is None else row[0]


class _PcCopy:
    """One PC's share of a scratch copy (see the module rule for ids)."""

    def __init__(self, pg, out: sqlite3.Connection, pc: int, shift: int, names: dict[str, str]) -> None:
        self.pg, self.out, self.pc, self.shift, self.names = pg, out, pc, shift, names
        self.maps: dict[str, dict[Any, Any]] = defaultdict(dict)
        self.rows: dict[str, list[dict[str, Any]]] = defaultdict(list)
        for tbl, data in pg.execute("SELECT tbl, data FROM records WHERE pc_id = %s AND tbl <> ALL(%s) "
                                    "ORDER BY tbl, key", (pc, list(_NOT_COPIED))):
            self.rows[tbl].append({k: decode_value(v) for k, v in data.items()})

    def run(self, events: str) -> None:
        self._codes()
        for tbl in ("protocols", "rigs", "imports", "sources", "assignment_plans"):
            self._by_name(tbl)
        self._animals()
        sessions = [s for s in self.rows["sessions"] if s["animal"] in self.names]
        ids = [s["id"] for s in sessions]
        for s in sessions:
            s["animal"] = self.names[s["animal"]]
            self._put("sessions", s)
        keep = set(ids)
        built = set()
        for tbl in sorted(self.rows):
            if tbl in ("sessions", "animals", *_UNIQUE_BY_NAME) or not _columns(self.out, tbl):
                continue
            for row in self.rows[tbl]:
                if ("session_id" in row and row["session_id"] in keep) or \
                        ("session_id" not in row and row.get("animal_id") in self.maps["animal_id"]):
                    self._put(tbl, row)
                    if tbl == "trial_builds":
                        built.add(row["session_id"])
        self._trials(ids)
        need = ids if events == "all" else [i for i in ids if i not in built]
        if events == "latest" and sessions:   # and the PC's latest session of these animals (its histograms)
            latest = max(sessions, key=lambda s: (s["started_at"] or 0, s["id"]))["id"]
            need = sorted(set(need) | {latest})
        if need:
            self._events(need)
            for (data,) in self.pg.execute("SELECT data FROM records WHERE pc_id = %s AND tbl = 'raw_lines' AND "
                                           "(data->>'session_id')::bigint = ANY(%s)", (self.pc, need)):
                self._put("raw_lines", {k: decode_value(v) for k, v in data.items()})

    def _codes(self) -> None:
        known = dict(self.out.execute("SELECT name, code FROM event_codes"))
        for row in self.rows["event_codes"]:
            if row["name"] not in known:
                code = max(max(known.values(), default=0) + 1, 1000)
                self.out.execute("INSERT INTO event_codes (code, name, known) VALUES (?, ?, ?)",
                                 (code, row["name"], row["known"]))
                known[row["name"]] = code
            self.maps["code"][row["code"]] = known[row["name"]]

    def _by_name(self, tbl: str) -> None:
        """Rows that are unique by a name in a store: the first PC's row wins, ids are matched."""
        columns = _columns(self.out, tbl)
        unique = {"protocols": ("name", "version"), "rigs": ("name",), "imports": ("sha256",),
                  "sources": ("kind", "path"), "assignment_plans": ("cohort",)}[tbl]
        id_column = {"protocols": "protocol_id", "imports": "import_id", "sources": "source_id"}.get(tbl)
        for row in self.rows[tbl]:
            values = {k: v for k, v in row.items() if k in columns and k != "id"}
            _insert(self.out, tbl, values, ignore=True)
            if id_column is not None:
                where = " AND ".join(f"{k} = ?" for k in unique)
                found = self.out.execute(f"SELECT id FROM {tbl} WHERE {where}", [row[k] for k in unique]).fetchone()
                self.maps[id_column][row["id"]] = found[0]

    def _animals(self) -> None:
        for row in self.rows["animals"]:
            if row["name"] not in self.names:
                continue
            shown = self.names[row["name"]]
            found = self.out.execute("SELECT id FROM animals WHERE name = ?", (shown,)).fetchone()
            if found is None:
                new = dict(row, name=shown, id=row["id"] + self.shift)
                _insert(self.out, "animals", {k: v for k, v in new.items() if k in _columns(self.out, "animals")})
                found = (new["id"],)
            self.maps["animal_id"][row["id"]] = found[0]
        for local, shown in self.names.items():  # animals seen only in sessions
            if not any(r["name"] == local for r in self.rows["animals"]):
                found = self.out.execute("SELECT id FROM animals WHERE name = ?", (shown,)).fetchone()
                if found is None:
                    _insert(self.out, "animals", {"name": shown, "created_at": 0.0})

    def _put(self, tbl: str, row: dict[str, Any]) -> None:
        columns = _columns(self.out, tbl)
        values = {}
        for k, v in row.items():
            if k not in columns:
                continue
            if v is not None and k in self.maps:
                v = self.maps[k].get(v, v)
            elif v is not None and k in _ID_COLUMNS:
                v = v + self.shift
            values[k] = v
        _insert(self.out, tbl, values, ignore=True)

    def _trials(self, ids: list[int]) -> None:
        rows = self.pg.execute(f"SELECT {', '.join(_TRIAL_COLUMNS)} FROM trials WHERE pc_id = %s "
                               "AND session_id = ANY(%s)", (self.pc, ids))
        self.out.executemany(f"INSERT INTO trials ({', '.join(_TRIAL_COLUMNS)}) VALUES "
                             f"({', '.join('?' * len(_TRIAL_COLUMNS))})",
                             ((r[0] + self.shift, *r[1:]) for r in rows))

    def _events(self, ids: list[int]) -> None:
        codes, shift = self.maps["code"], self.shift
        with self.pg.cursor(name="lab_events") as cur:
            cur.itersize = 20_000
            cur.execute(_EVENT_SQL, (self.pc, ids))
            self.out.executemany(
                "INSERT INTO events (rowid, session_id, segment, line, t_us, raw_time, code, value, wall) "
                "VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?)",
                ((r[0] + shift, r[1] + shift, r[2], r[3], r[4], r[5], codes.get(r[6], r[6]), r[7], r[8]) for r in cur))


def _columns(out: sqlite3.Connection, tbl: str) -> set[str]:
    return {r[1] for r in out.execute(f'PRAGMA table_info("{tbl}")')}


def _insert(out: sqlite3.Connection, tbl: str, values: dict[str, Any], ignore: bool = False) -> None:
    if not values:
        return
    names = list(values)
    out.execute(f'INSERT {"OR IGNORE " if ignore else ""}INTO "{tbl}" ({", ".join(names)}) '
                f'VALUES ({", ".join("?" * len(names))})', [values[n] for n in names])


# --- the questions ---------------------------------------------------------------------------------


def scratch_store(directory: str) -> sqlite3.Connection:
    """An empty store at the current local schema, in `directory` (cheap: no sync to disk)."""
    from monitor.store.db import open_store

    return open_store(Path(directory) / SCRATCH_NAME, synchronous="OFF")


def copy_to(url: str, path: Path, animal: str | None = None) -> list[str]:
    """A local store file at `path` (which must not exist) holding the lab's animals (or one), events and all;
    written under a temporary name and renamed when complete. Returns the animals copied."""
    import os

    with Lab(url) as lab:
        chosen = [a for a in lab.animals() if animal is None or a.shown == animal]
        if animal is not None and not chosen:
            raise LabError(f"no animal {animal!r} in the lab")
        with tempfile.TemporaryDirectory(prefix="rigside-lab-", dir=path.parent) as directory:
            out = scratch_store(directory)
            try:
                lab.copy_animals(out, chosen, events="all")
                out.execute("PRAGMA wal_checkpoint(TRUNCATE)")
                out.execute("PRAGMA journal_mode = DELETE")
            finally:
                out.close()
            os.replace(Path(directory) / SCRATCH_NAME, path)
    return [a.shown for a in chosen]


def report(url: str, animal: str | None = None) -> dict[str, Any]:
    """the report JSON in docs/cli.md for the lab: one animal (its shown name) or every lab animal."""
    from monitor.store.reporting import animal_entry

    with Lab(url) as lab:
        chosen = lab.animals()
        if animal is not None:
            chosen = [a for a in chosen if a.shown == animal]
            if not chosen:
                raise LabError(f"no animal {animal!r} in the lab")
        entries = []
        for one in chosen:
            with tempfile.TemporaryDirectory(prefix="rigside-lab-") as directory:
                out = scratch_store(directory)
                try:
                    lab.copy_animals(out, [one])
                    entry = animal_entry(out, one.shown)
                finally:
                    out.close()
            if entry is not None:
                entries.append(entry)
    return {"animals": entries}


@dataclass(frozen=True)
class AnimalCopy:
    """One lab animal in a scratch store at `path` (its sessions, trials, fits, care entries, events of sessions
    without trials and of the latest session), and its decision entries from each PC it trained on, with that
    PC's chain check."""

    path: Path
    decisions: tuple[Any, ...]              # monitor.core.eligibility.decision_log.LogEntry, PC by PC
    chains: tuple[tuple[str, Any], ...]     # (PC name, ChainCheck of that PC's whole decision log)


def copy_animal(url: str, shown: str, directory: str) -> AnimalCopy:
    """The lab animal shown as `shown`, copied into a scratch store in `directory` (see AnimalCopy)."""
    from monitor.store.decisions import entries, verify

    with Lab(url) as lab:
        found = [a for a in lab.animals() if a.shown == shown]
        if not found:
            raise LabError(f"no animal {shown!r} in the lab")
        names = {pc["pc"]: pc["name"] for pc in lab.pcs()}
        decisions: list[Any] = []
        chains: list[tuple[str, Any]] = []

        def log_of(pc: int, local: str, log: sqlite3.Connection) -> None:
            lab.entries_of(pc, "decisions", log)
            decisions.extend(entries(log, local))
            chains.append((names.get(pc, f"PC {pc}"), verify(log)))

        out = scratch_store(directory)
        try:
            lab.copy_animals(out, found, events="latest")
            log_of(*found[0].places[0], out)    # the first PC's whole log, as in its own store
        finally:
            out.close()
        for pc, local in found[0].places[1:]:   # each other PC's log apart (entry ids are per PC)
            with tempfile.TemporaryDirectory(prefix="rigside-lab-") as logs:
                log = scratch_store(logs)
                try:
                    log_of(pc, local, log)
                finally:
                    log.close()
    return AnimalCopy(Path(directory) / SCRATCH_NAME, tuple(decisions), tuple(chains))


def with_copy(url: str, directory: str, *, events: str) -> sqlite3.Connection:
    """A scratch store in `directory` holding every lab animal (events: 'all' or 'unbuilt')."""
    with Lab(url) as lab:
        out = scratch_store(directory)
        lab.copy_animals(out, lab.animals(), events=events)
    return out


@dataclass(frozen=True)
class PcChains:
    """One PC's two chains as the lab holds them; `care_animal` names the animal of the first broken care entry."""

    pc: str
    decisions: Any            # monitor.core.eligibility.decision_log.ChainCheck
    care: Any                 # monitor.core.care.chain.CareChainCheck
    care_animal: str | None = None

    @property
    def ok(self) -> bool:
        return self.decisions.ok and self.care.ok


def verify_chains(url: str) -> Iterator[PcChains]:
    """Every PC's decision chain and care chain, rebuilt from the lab's rows and checked by the local code."""
    from monitor.store.care_log import verify as verify_care
    from monitor.store.decisions import verify

    with Lab(url) as lab:
        for pc in lab.pcs():
            with tempfile.TemporaryDirectory(prefix="rigside-lab-") as directory:
                out = scratch_store(directory)
                try:
                    lab.entries_of(pc["pc"], "decisions", out)
                    lab.entries_of(pc["pc"], "care_log", out)
                    decisions, care = verify(out), verify_care(out)
                    animal = None
                    if care.entry is not None:
                        row = out.execute("SELECT animal_id FROM care_log WHERE id = ?", (care.entry,)).fetchone()
                        animal = None if row is None else lab.local_animal(pc["pc"], row[0])
                finally:
                    out.close()
            yield PcChains(pc["name"], decisions, care, animal)
