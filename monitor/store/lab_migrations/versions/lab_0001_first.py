"""The lab database's first schema: PCs, the animal registry, synced rows, events, trials, bookmarks.

Rule: every row that came from a rig PC carries that PC's number (`pc_id`)
and its local id, so identities are lab-wide and a re-sent row can never
become a second row. Decision and care entries are insert-only here too:
a trigger refuses to update or delete them.

Revision ID: lab_0001
Revises:
"""

from alembic import op

revision = "lab_0001"
down_revision = None
branch_labels = None
depends_on = None

APPEND_ONLY_TABLES = ("decisions", "care_log")

_STATEMENTS = (
    """CREATE TABLE pcs (
        id SERIAL PRIMARY KEY,
        uuid TEXT NOT NULL UNIQUE,          -- made once by the PC's local store
        name TEXT NOT NULL,                 -- the PC's name as a person reads it (host name by default)
        first_sync TIMESTAMPTZ NOT NULL DEFAULT now(),
        last_sync TIMESTAMPTZ
    )""",
    """CREATE TABLE animals (
        id SERIAL PRIMARY KEY,              -- the lab-wide animal
        name TEXT NOT NULL,
        lab_id TEXT,                        -- the lab's own identifier (ear tag, colony number): tells same names apart
        created TIMESTAMPTZ NOT NULL DEFAULT now(),
        UNIQUE (name, lab_id)
    )""",
    """CREATE TABLE pc_animals (
        pc_id INTEGER NOT NULL REFERENCES pcs(id),
        local_name TEXT NOT NULL,           -- the animal's name in that PC's store
        animal_id INTEGER NOT NULL REFERENCES animals(id),
        PRIMARY KEY (pc_id, local_name)
    )""",
    """CREATE TABLE records (
        pc_id INTEGER NOT NULL REFERENCES pcs(id),
        tbl TEXT NOT NULL,                  -- the local table the row came from
        key TEXT NOT NULL,                  -- its rowid (or primary key as JSON) there
        digest TEXT NOT NULL,               -- of the row's canonical JSON: a changed row is sent again
        data JSONB NOT NULL,                -- the row: column -> value (BLOBs as {"base64": ...})
        synced_at TIMESTAMPTZ NOT NULL DEFAULT now(),
        PRIMARY KEY (pc_id, tbl, key)
    )""",
    """CREATE TABLE events (
        pc_id INTEGER NOT NULL REFERENCES pcs(id),
        rid BIGINT NOT NULL,                -- the event's rowid in the PC's store
        session_id BIGINT NOT NULL,
        segment INTEGER NOT NULL,
        line BIGINT NOT NULL,
        t_us BIGINT NOT NULL,
        raw_time BIGINT NOT NULL,
        code INTEGER NOT NULL,              -- the PC's event_codes.code (names in records, tbl = 'event_codes')
        value TEXT,
        wall TEXT,
        PRIMARY KEY (pc_id, rid)
    )""",
    """CREATE TABLE trials (
        pc_id INTEGER NOT NULL REFERENCES pcs(id),
        session_id BIGINT NOT NULL,
        idx INTEGER NOT NULL,
        t_us BIGINT NOT NULL,
        interval_ms DOUBLE PRECISION,
        target_ms DOUBLE PRECISION NOT NULL,
        window_low_ms DOUBLE PRECISION NOT NULL,
        window_high_ms DOUBLE PRECISION NOT NULL,
        stage TEXT NOT NULL,
        outcome TEXT NOT NULL,
        rewarded INTEGER NOT NULL,
        outcome_source TEXT NOT NULL,
        computed_outcome TEXT NOT NULL,
        segment INTEGER NOT NULL,
        PRIMARY KEY (pc_id, session_id, idx)
    )""",
    """CREATE TABLE bookmarks (
        pc_id INTEGER NOT NULL REFERENCES pcs(id),
        tbl TEXT NOT NULL,
        last_rowid BIGINT NOT NULL,         -- every row of tbl up to this rowid is here (same transaction)
        PRIMARY KEY (pc_id, tbl)
    )""",
    """CREATE FUNCTION refuse_entry_change() RETURNS trigger LANGUAGE plpgsql AS $$
    BEGIN
        RAISE EXCEPTION '% entries are insert-only in the lab database: a correction is a new entry', OLD.tbl;
    END $$""",
    f"""CREATE TRIGGER records_entries_insert_only BEFORE UPDATE OR DELETE ON records
        FOR EACH ROW WHEN (OLD.tbl IN ({", ".join(f"'{t}'" for t in APPEND_ONLY_TABLES)}))
        EXECUTE FUNCTION refuse_entry_change()""",
    """CREATE FUNCTION refuse_truncate() RETURNS trigger LANGUAGE plpgsql AS $$
    BEGIN
        RAISE EXCEPTION 'the lab''s records are not truncated: decision and care entries are insert-only';
    END $$""",
    """CREATE TRIGGER records_no_truncate BEFORE TRUNCATE ON records
        FOR EACH STATEMENT EXECUTE FUNCTION refuse_truncate()""",
)


def upgrade() -> None:
    for statement in _STATEMENTS:
        op.execute(statement)

