"""The store's schema: numbered forward migrations, applied in order, never edited once shipped.

Rule: `MIGRATIONS[i]` takes a database from version i to version i + 1; the
version lives in `PRAGMA user_version` and the file is marked as ours by
`PRAGMA application_id`. A change to the schema is a new `Migration` appended
to the list (SQL statements, or a Python step for data changes); a shipped
migration is never edited. Each migration runs in one transaction together
with its version bump, so a crash leaves the old version or the new one.
A file with a newer version, another application's id, or tables but no
version is refused by `monitor.store.db`, never changed.

Version 1 (live sources): sources, sessions, event_codes, events
(the lean hot table: no index, no raw text), raw_lines (only what an event row
cannot reproduce), gaps, file_offsets (a file source's resume position, written
in the same transaction as its events) and clock_samples (host receive time of
serial batches, for device-to-host alignment). Times named `*_at` are host
wall-clock seconds since the epoch (REAL); `*_wall` are ISO 8601 text.

Version 2 (the animal store): rigs (name bound to a USB serial or port, valve
calibration), animals (what NWB's subject asks for, usual boxes, baseline
weight), protocols (unique name and version), imports (content hash: a file is
imported once), session columns (animal, protocol, stage, exclusion, event rowid
range), check-ins, conditions, trials (derived, rebuildable) with their build
counts, decisions (insert-only: triggers refuse UPDATE and DELETE), the care
log, cached fits, cached report entries and alerts. The hot events table stays
as it was: no index.

Version 3 (random assignment): assignment_plans, one row per cohort (method,
seed, groups, per_block, blinded), insert-only like the decisions: a plan is
never changed once its seed is drawn.

Subject records: animals gain lab id, supplier, age (days, stated on a date),
the baseline weight's date, notes and retirement; `animal_changes` logs every
change of a record (field, old -> new, who, when), rows only added.
Source locks: one row per source being recorded, naming the process that
records it (monitor.store.source_locks).

Care chain: care_log entries gain `replaces`/`action` (a void or a
correction is a new entry), `reason`, `confirmed`, and a hash chain
(`prev_hash`, `hash`, monitor.core.care.chain); triggers refuse UPDATE and
DELETE, like the decisions.
Lab sync: lab_sync (this PC's lab identity and the last sync's state, key ->
value) and lab_bookmarks (the lab's bookmarks as last seen, for "rows
waiting" while the server is away); monitor.store.lab_sync writes both.
Manipulations: manipulations, one row per
recorded manipulation or its withdrawal (acute or lasting, test or control,
the first affected session, an acute test's control session, the group or its
code, the frozen stage at the time), hash-chained and insert-only like the
decisions; unblindings, one insert-only row per cohort whose group labels a
person chose to show.
"""

from __future__ import annotations

import sqlite3
from dataclasses import dataclass
from typing import Callable, Union

from drivers.wire import EVENT_SPECS

APPLICATION_ID = 0x52534431  # "RSD1": marks a rigside database

Step = Union[str, Callable[[sqlite3.Connection], None]]


@dataclass(frozen=True)
class Migration:
    """One step forward: `steps` run in order inside one transaction."""

    summary: str
    steps: tuple[Step, ...]


# Known event words get fixed small codes; unknown words are added by the writer from 1000 on.
KNOWN_EVENT_CODES = {name: code for code, name in enumerate(EVENT_SPECS, start=1)}
FIRST_UNKNOWN_CODE = 1000

_V1 = (
    """CREATE TABLE sources (
        id INTEGER PRIMARY KEY,
        kind TEXT NOT NULL CHECK (kind IN ('serial', 'file')),
        path TEXT NOT NULL,            -- as configured: a by-id symlink, COM name, URL or file path
        rig TEXT,
        usb_serial TEXT,
        mapping_path TEXT,
        created_at REAL NOT NULL,
        UNIQUE (kind, path)
    )""",
    """CREATE TABLE sessions (
        id INTEGER PRIMARY KEY,
        source_id INTEGER REFERENCES sources(id),
        animal TEXT NOT NULL,
        rig TEXT NOT NULL,
        protocol_name TEXT,
        protocol_version INTEGER,
        protocol_text TEXT,
        started_at REAL NOT NULL,
        ended_at REAL,                  -- NULL while recording (or after a crash)
        start_wall TEXT NOT NULL        -- ISO 8601 with UTC offset
    )""",
    """CREATE TABLE event_codes (
        code INTEGER PRIMARY KEY,
        name TEXT NOT NULL UNIQUE,
        known INTEGER NOT NULL          -- 1: an event of wire format v1
    )""",
    lambda conn: conn.executemany("INSERT INTO event_codes (code, name, known) VALUES (?, ?, 1)",
                                  [(code, name) for name, code in KNOWN_EVENT_CODES.items()]),
    """CREATE TABLE events (
        session_id INTEGER NOT NULL,
        segment INTEGER NOT NULL,       -- clock segment: a header line or reconnect starts a new one
        line INTEGER NOT NULL,          -- line number in the source's byte stream (file: in the file)
        t_us INTEGER NOT NULL,          -- unwrapped device time, microseconds, within the segment
        raw_time INTEGER NOT NULL,      -- the device counter as sent
        code INTEGER NOT NULL,          -- event_codes.code
        value TEXT,                     -- the arguments joined by one space; NULL when none
        wall TEXT                       -- mapped formats' wall time (ISO 8601); NULL for wire format
    )""",
    """CREATE TABLE raw_lines (
        session_id INTEGER NOT NULL,
        line INTEGER,
        byte_offset INTEGER,
        kind TEXT NOT NULL CHECK (kind IN ('malformed', 'unknown', 'note', 'header', 'comment', 'notice')),
        reason TEXT,                    -- malformed: why; notice: what happened
        raw BLOB                        -- the line's bytes as received (BLOB: may not be text)
    )""",
    """CREATE TABLE gaps (
        id INTEGER PRIMARY KEY,
        source_id INTEGER NOT NULL REFERENCES sources(id),
        session_id INTEGER REFERENCES sessions(id),
        start_at REAL NOT NULL,
        end_at REAL NOT NULL,
        reason TEXT NOT NULL
    )""",
    """CREATE TABLE file_offsets (
        source_id INTEGER PRIMARY KEY REFERENCES sources(id),
        byte_offset INTEGER NOT NULL,   -- first byte not yet stored as a record
        st_dev INTEGER NOT NULL,
        st_ino INTEGER NOT NULL,
        fingerprint TEXT NOT NULL,      -- sha256 of the first prefix_len bytes and the prefix_len before byte_offset
        prefix_len INTEGER NOT NULL,
        decoder TEXT NOT NULL,          -- JSON: line, offset, segment, clock/unwrap state
        updated_at REAL NOT NULL
    )""",
    """CREATE TABLE clock_samples (
        session_id INTEGER NOT NULL,
        segment INTEGER NOT NULL,
        t_us INTEGER NOT NULL,          -- device time of a batch's last event
        received_at REAL NOT NULL       -- host wall time the batch arrived
    )""",
)

# Version 2 (the animal store): who, where, under which protocol, what was done,
# the derived trials, the decision log, the care log, cached fits and alerts.
_APPEND_ONLY = "decisions are append-only: a correction is a new entry (rigside decide --corrects SEQ)"

_V2 = (
    """CREATE TABLE rigs (
        id INTEGER PRIMARY KEY,
        name TEXT NOT NULL UNIQUE,
        usb_serial TEXT,                -- the board's USB serial number (binds the name to the device)
        port TEXT,                      -- or the port / by-id path it is bound to
        valve_ul_per_ms REAL CHECK (valve_ul_per_ms IS NULL OR valve_ul_per_ms > 0),
        calibration_checked TEXT,       -- ISO date of the last valve calibration check
        created_at REAL NOT NULL
    )""",
    """CREATE TABLE animals (
        id INTEGER PRIMARY KEY,
        name TEXT NOT NULL UNIQUE,
        cohort TEXT,
        species TEXT,                   -- e.g. Rattus norvegicus (NWB subject)
        strain TEXT,
        sex TEXT CHECK (sex IS NULL OR sex IN ('F', 'M', 'U', 'O')),
        date_of_birth TEXT,             -- ISO date
        genotype TEXT,
        usual_boxes TEXT,               -- JSON list of rig names this animal normally trains in
        baseline_weight_g REAL CHECK (baseline_weight_g IS NULL OR baseline_weight_g > 0),
        created_at REAL NOT NULL
    )""",
    """CREATE TABLE protocols (
        id INTEGER PRIMARY KEY,
        name TEXT NOT NULL,
        version INTEGER NOT NULL,
        text TEXT NOT NULL,             -- the TOML as read
        created_at REAL NOT NULL,
        UNIQUE (name, version)
    )""",
    """CREATE TABLE imports (
        id INTEGER PRIMARY KEY,
        path TEXT NOT NULL,
        sha256 TEXT NOT NULL UNIQUE,    -- of the file's bytes: the same content is never imported twice
        size INTEGER NOT NULL,
        format TEXT NOT NULL CHECK (format IN ('wire', 'mapped')),
        mapping_text TEXT,
        imported_at REAL NOT NULL,
        sessions INTEGER NOT NULL,
        events INTEGER NOT NULL,
        malformed INTEGER NOT NULL
    )""",
    "ALTER TABLE sessions ADD COLUMN animal_id INTEGER REFERENCES animals(id)",
    "ALTER TABLE sessions ADD COLUMN protocol_id INTEGER REFERENCES protocols(id)",
    "ALTER TABLE sessions ADD COLUMN import_id INTEGER REFERENCES imports(id)",
    "ALTER TABLE sessions ADD COLUMN label TEXT",          # the file's or the mapping's name for it
    "ALTER TABLE sessions ADD COLUMN stage TEXT",          # stage in force at the start
    "ALTER TABLE sessions ADD COLUMN excluded INTEGER NOT NULL DEFAULT 0",
    "ALTER TABLE sessions ADD COLUMN exclusion_reason TEXT",
    "ALTER TABLE sessions ADD COLUMN excluded_by TEXT",
    "ALTER TABLE sessions ADD COLUMN excluded_at REAL",
    "ALTER TABLE sessions ADD COLUMN first_event INTEGER",  # rowid range of its events (a bounded scan)
    "ALTER TABLE sessions ADD COLUMN last_event INTEGER",
    # device time (µs, first clock segment) at which start_wall was taken; NULL: the first event
    "ALTER TABLE sessions ADD COLUMN start_device_us INTEGER",
    """CREATE TABLE checkins (
        id INTEGER PRIMARY KEY,
        session_id INTEGER NOT NULL UNIQUE REFERENCES sessions(id),
        animal_id INTEGER NOT NULL REFERENCES animals(id),
        rig TEXT NOT NULL,
        operator TEXT NOT NULL,
        weight_before_g REAL CHECK (weight_before_g IS NULL OR weight_before_g > 0),
        stage TEXT,
        protocol_id INTEGER REFERENCES protocols(id),
        warning TEXT,                   -- e.g. the animal is not in one of its usual boxes
        checked_in_at REAL NOT NULL,
        checked_out_at REAL
    )""",
    """CREATE TABLE conditions (
        id INTEGER PRIMARY KEY,
        session_id INTEGER NOT NULL REFERENCES sessions(id),
        what TEXT NOT NULL,             -- surgery, inactivation (drug, site), infusion, ...
        dose TEXT,
        volume_ul REAL,
        sham INTEGER NOT NULL DEFAULT 0,
        notes TEXT,
        operator TEXT NOT NULL,
        at TEXT NOT NULL                -- ISO 8601 with UTC offset
    )""",
    """CREATE TABLE trials (
        session_id INTEGER NOT NULL REFERENCES sessions(id),
        idx INTEGER NOT NULL,           -- Trial.index, from 1
        t_us INTEGER NOT NULL,          -- session-relative device time of the first press / crossing
        interval_ms REAL,               -- NULL when there is none
        target_ms REAL NOT NULL,
        window_low_ms REAL NOT NULL,
        window_high_ms REAL NOT NULL,
        stage TEXT NOT NULL,
        outcome TEXT NOT NULL,
        rewarded INTEGER NOT NULL,
        outcome_source TEXT NOT NULL,
        computed_outcome TEXT NOT NULL,
        segment INTEGER NOT NULL,
        PRIMARY KEY (session_id, idx)
    ) WITHOUT ROWID""",
    """CREATE TABLE trial_builds (
        session_id INTEGER PRIMARY KEY REFERENCES sessions(id),
        protocol_id INTEGER REFERENCES protocols(id),
        built_at REAL NOT NULL,
        trials INTEGER NOT NULL,
        counts TEXT NOT NULL,           -- JSON: TrialBuilder.counts (inter_trial, disagreements, ...)
        water_ul REAL,
        malformed INTEGER NOT NULL
    )""",
    """CREATE TABLE decisions (
        id INTEGER PRIMARY KEY,         -- insertion order (verify reads in this order)
        seq INTEGER NOT NULL UNIQUE,    -- the entry's number in the chain, from 1
        prev_hash TEXT NOT NULL,
        algorithm TEXT NOT NULL,
        decision TEXT NOT NULL,
        animal TEXT NOT NULL,
        operator TEXT NOT NULL,
        reason TEXT NOT NULL,
        time TEXT NOT NULL,
        group_name TEXT,
        group_code TEXT,
        planned_manipulation TEXT,
        planned_date TEXT,
        assignment_method TEXT,
        assignment_seed INTEGER,
        snapshot TEXT,                  -- canonical JSON of the figures and the rule's verdict
        rule_state TEXT,
        disagrees_with_rule INTEGER NOT NULL,
        corrects INTEGER,
        payload TEXT NOT NULL,          -- the canonical text that was hashed
        hash TEXT NOT NULL
    )""",
    f"""CREATE TRIGGER decisions_no_update BEFORE UPDATE ON decisions
        BEGIN SELECT RAISE(ABORT, '{_APPEND_ONLY}'); END""",
    f"""CREATE TRIGGER decisions_no_delete BEFORE DELETE ON decisions
        BEGIN SELECT RAISE(ABORT, '{_APPEND_ONLY}'); END""",
    """CREATE TABLE care_log (
        id INTEGER PRIMARY KEY,
        animal_id INTEGER NOT NULL REFERENCES animals(id),
        kind TEXT NOT NULL CHECK (kind IN ('supplement', 'weight', 'note')),
        at TEXT NOT NULL,               -- ISO 8601 with UTC offset
        amount REAL,                    -- supplement: ml; weight: g
        by TEXT NOT NULL,
        text TEXT,
        recorded_at REAL NOT NULL
    )""",
    """CREATE TABLE fits (
        id INTEGER PRIMARY KEY,
        animal_id INTEGER NOT NULL REFERENCES animals(id),
        created_at REAL NOT NULL,
        fingerprint TEXT NOT NULL,      -- of the data fitted (monitor.store.fits.data_fingerprint)
        params TEXT NOT NULL,           -- JSON
        block TEXT NOT NULL,            -- JSON: the report's consolidation block
        sessions TEXT NOT NULL          -- JSON: per-session estimates
    )""",
    """CREATE TABLE alerts (
        id INTEGER PRIMARY KEY,
        animal_id INTEGER REFERENCES animals(id),
        rig TEXT,
        kind TEXT NOT NULL,
        level TEXT NOT NULL,
        message TEXT NOT NULL,
        raised_at REAL NOT NULL,
        acknowledged_by TEXT,
        acknowledged_at REAL
    )""",
    """CREATE TABLE report_cache (
        animal_id INTEGER PRIMARY KEY REFERENCES animals(id),
        fingerprint TEXT NOT NULL,      -- monitor.store.reporting.report_fingerprint when it was built
        entry TEXT NOT NULL,            -- JSON: the animal's report entry without `consolidation`
        built_at REAL NOT NULL
    )""",
    "CREATE INDEX trials_by_session ON trials (session_id)",
    "CREATE INDEX care_by_animal ON care_log (animal_id, at)",
    "CREATE INDEX fits_by_animal ON fits (animal_id, created_at)",
    "CREATE INDEX sessions_by_animal ON sessions (animal_id, started_at)",
)

_NO_REPLAN = "an assignment plan is never changed: its seed was drawn once and recorded"

_V3 = (
    """CREATE TABLE assignment_plans (
        cohort TEXT PRIMARY KEY,        -- the eligibility rule's cohort (else the protocol's name)
        method TEXT NOT NULL,           -- monitor.core.eligibility.assignment: blocks-sha256-v1 | cohort-sha256-v1
        seed INTEGER NOT NULL,          -- drawn once with new_seed()
        groups TEXT NOT NULL,           -- JSON list of the rule's group names, in the rule's order
        per_block INTEGER NOT NULL CHECK (per_block >= 1),
        blinded INTEGER NOT NULL,       -- 1: animals are drawn among the groups' codes
        created_at TEXT NOT NULL        -- ISO 8601 with UTC offset
    )""",
    f"""CREATE TRIGGER assignment_plans_no_update BEFORE UPDATE ON assignment_plans
        BEGIN SELECT RAISE(ABORT, '{_NO_REPLAN}'); END""",
    f"""CREATE TRIGGER assignment_plans_no_delete BEFORE DELETE ON assignment_plans
        BEGIN SELECT RAISE(ABORT, '{_NO_REPLAN}'); END""",
)

_NO_REWRITE = "the animal change log is append-only"

_SUBJECTS = (
    "ALTER TABLE animals ADD COLUMN lab_id TEXT",
    "ALTER TABLE animals ADD COLUMN supplier TEXT",
    "ALTER TABLE animals ADD COLUMN age_days INTEGER CHECK (age_days IS NULL OR age_days >= 0)",
    "ALTER TABLE animals ADD COLUMN age_date TEXT",           # ISO date on which age_days was stated
    "ALTER TABLE animals ADD COLUMN baseline_weight_date TEXT",  # ISO date of the baseline weighing
    "ALTER TABLE animals ADD COLUMN notes TEXT",
    "ALTER TABLE animals ADD COLUMN retired_at TEXT",         # ISO 8601 with UTC offset; NULL: in training
    "ALTER TABLE animals ADD COLUMN retired_reason TEXT",
    """CREATE TABLE animal_changes (
        id INTEGER PRIMARY KEY,
        animal_id INTEGER NOT NULL REFERENCES animals(id),
        field TEXT NOT NULL,            -- a column of animals ('created' when the record was added)
        old TEXT,                       -- the value before, as text; NULL when empty
        new TEXT,
        by TEXT NOT NULL,
        at TEXT NOT NULL                -- ISO 8601 with UTC offset
    )""",
    "CREATE INDEX animal_changes_by_animal ON animal_changes (animal_id, id)",
    f"""CREATE TRIGGER animal_changes_no_update BEFORE UPDATE ON animal_changes
        BEGIN SELECT RAISE(ABORT, '{_NO_REWRITE}'); END""",
    f"""CREATE TRIGGER animal_changes_no_delete BEFORE DELETE ON animal_changes
        BEGIN SELECT RAISE(ABORT, '{_NO_REWRITE}'); END""",
)

_SOURCE_LOCKS = (
    """CREATE TABLE source_locks (
        resource TEXT PRIMARY KEY,      -- monitor.store.source_locks.resource_key: kind and real path
        holder TEXT NOT NULL,           -- what records it: "rigside record", "the rigside window"
        host TEXT NOT NULL,
        pid INTEGER NOT NULL,
        taken_at REAL NOT NULL,
        heartbeat_at REAL NOT NULL      -- refreshed by the holder's store writer
    )""",
)

_CARE_NO_CHANGE = "the care log is append-only: void or correct an entry with a new one"


def _chain_care_log(conn: sqlite3.Connection) -> None:
    """Hash-chain the care entries already there, in insertion order."""
    from monitor.store.care_log import chain_existing

    chain_existing(conn)


_CARE_CHAIN = (
    "ALTER TABLE care_log ADD COLUMN replaces INTEGER REFERENCES care_log(id)",  # the entry voided or corrected
    "ALTER TABLE care_log ADD COLUMN action TEXT CHECK (action IN ('void', 'correct'))",
    "ALTER TABLE care_log ADD COLUMN reason TEXT",      # why it was voided, corrected or confirmed
    "ALTER TABLE care_log ADD COLUMN confirmed TEXT",   # a person's reason for a value outside the usual
    "ALTER TABLE care_log ADD COLUMN prev_hash TEXT",
    "ALTER TABLE care_log ADD COLUMN hash TEXT",
    _chain_care_log,
    f"""CREATE TRIGGER care_log_no_update BEFORE UPDATE ON care_log
        BEGIN SELECT RAISE(ABORT, '{_CARE_NO_CHANGE}'); END""",
    f"""CREATE TRIGGER care_log_no_delete BEFORE DELETE ON care_log
        BEGIN SELECT RAISE(ABORT, '{_CARE_NO_CHANGE}'); END""",
)

_LAB_SYNC = (
    """CREATE TABLE lab_sync (
        key TEXT PRIMARY KEY,           -- pc_uuid, pc_name, last_sync_at, unreachable_since, last_error
        value TEXT NOT NULL
    )""",
    """CREATE TABLE lab_bookmarks (
        tbl TEXT PRIMARY KEY,           -- a table synced by rowid (events, decisions, care_log, ...)
        last_rowid INTEGER NOT NULL     -- the lab holds every row up to here (as of the last sync)
    )""",
)

_MANIPULATIONS_APPEND_ONLY = "manipulations are append-only: a mistake is withdrawn by a new entry"
_UNBLINDINGS_APPEND_ONLY = "an unblinding is never undone"

_MANIPULATIONS = (
    """CREATE TABLE manipulations (
        id INTEGER PRIMARY KEY,         -- insertion order
        seq INTEGER NOT NULL UNIQUE,    -- the entry's number in the chain, from 1
        prev_hash TEXT NOT NULL,
        animal TEXT NOT NULL,
        cohort TEXT,
        duration TEXT NOT NULL CHECK (duration IN ('acute', 'lasting')),
        role TEXT NOT NULL CHECK (role IN ('test', 'control')),
        what TEXT NOT NULL,             -- e.g. muscimol M1 0.5 ul, saline, lesion, sham surgery
        session_id INTEGER NOT NULL REFERENCES sessions(id),   -- the first affected session
        control_session_id INTEGER REFERENCES sessions(id),    -- an acute test's control session
        group_name TEXT,                -- NULL when blinded (then group_code)
        group_code TEXT,
        operator TEXT NOT NULL,
        reason TEXT NOT NULL,
        time TEXT NOT NULL,             -- when it was made: ISO 8601 with UTC offset
        stage TEXT NOT NULL,            -- canonical JSON: the stage at the last session before it
        withdraws INTEGER,              -- seq of an earlier entry this one withdraws
        payload TEXT NOT NULL,          -- the canonical text that was hashed
        hash TEXT NOT NULL
    )""",
    f"""CREATE TRIGGER manipulations_no_update BEFORE UPDATE ON manipulations
        BEGIN SELECT RAISE(ABORT, '{_MANIPULATIONS_APPEND_ONLY}'); END""",
    f"""CREATE TRIGGER manipulations_no_delete BEFORE DELETE ON manipulations
        BEGIN SELECT RAISE(ABORT, '{_MANIPULATIONS_APPEND_ONLY}'); END""",
    "CREATE INDEX manipulations_by_animal ON manipulations (animal)",
    """CREATE TABLE unblindings (
        cohort TEXT PRIMARY KEY,
        operator TEXT NOT NULL,
        reason TEXT NOT NULL,
        time TEXT NOT NULL              -- ISO 8601 with UTC offset
    )""",
    f"""CREATE TRIGGER unblindings_no_update BEFORE UPDATE ON unblindings
        BEGIN SELECT RAISE(ABORT, '{_UNBLINDINGS_APPEND_ONLY}'); END""",
    f"""CREATE TRIGGER unblindings_no_delete BEFORE DELETE ON unblindings
        BEGIN SELECT RAISE(ABORT, '{_UNBLINDINGS_APPEND_ONLY}'); END""",
)

_NO_SESSION_REWRITE = "the session changes log is append-only"

_SESSION_CHANGES = (
    """CREATE TABLE session_changes (
        id INTEGER PRIMARY KEY,
        session_id INTEGER NOT NULL REFERENCES sessions(id),
        change TEXT NOT NULL CHECK (change IN ('given', 'excluded', 'included')),
        animal TEXT,                    -- who the session belongs to after the change
        reason TEXT NOT NULL,
        operator TEXT NOT NULL,
        at TEXT NOT NULL                -- ISO 8601 with UTC offset
    )""",
    f"""CREATE TRIGGER session_changes_no_update BEFORE UPDATE ON session_changes
        BEGIN SELECT RAISE(ABORT, '{_NO_SESSION_REWRITE}'); END""",
    f"""CREATE TRIGGER session_changes_no_delete BEFORE DELETE ON session_changes
        BEGIN SELECT RAISE(ABORT, '{_NO_SESSION_REWRITE}'); END""",
    "ALTER TABLE checkins ADD COLUMN checked_out_by TEXT",   # who checked the animal out (confirmed)
)

MIGRATIONS: tuple[Migration, ...] = (
    Migration("live sources: sources, sessions, events, raw lines, gaps, file offsets", _V1),
    Migration("rigs, animals, protocols, imports, check-ins, conditions, exclusions, trials, decisions, "
              "care log, fits, alerts", _V2),
    Migration("assignment plans", _V3),
    Migration("subject records: lab id, supplier, age, baseline date, notes, retirement; animal change log",
              _SUBJECTS),
    Migration("source locks: one recorder per source", _SOURCE_LOCKS),
    Migration("care log: void and correct, confirmations, hash chain, append-only", _CARE_CHAIN),
    Migration("lab sync: this PC's lab identity and bookmarks", _LAB_SYNC),
    Migration("manipulations and unblindings", _MANIPULATIONS),
    Migration("session changes log: unattended runs given to an animal, exclusions and their undoing; "
              "who checked an animal out",
              _SESSION_CHANGES),
)
SCHEMA_VERSION = len(MIGRATIONS)


def apply_migrations(conn: sqlite3.Connection, migrations: tuple[Migration, ...] = MIGRATIONS) -> int:
    """Bring a connection (autocommit mode) to the newest version; return it.

    The version is read again inside each write transaction, so two processes
    opening a new file at once migrate it once.
    """
    while True:
        conn.execute("BEGIN IMMEDIATE")
        try:
            version = conn.execute("PRAGMA user_version").fetchone()[0]
            if version >= len(migrations):
                conn.execute("COMMIT")
                return version
            for step in migrations[version].steps:
                if callable(step):
                    step(conn)
                else:
                    conn.execute(step)
            conn.execute(f"PRAGMA user_version = {version + 1}")
            if version == 0:
                conn.execute(f"PRAGMA application_id = {APPLICATION_ID}")
            conn.execute("COMMIT")
        except BaseException:
            conn.execute("ROLLBACK")
            raise
