"""The lab database on PostgreSQL: reaching it, and creating or upgrading its schema with Alembic.

Rule: the lab is named by a libpq URL (`postgresql://user@host/db`, with
`?options=-csearch_path%3DNAME` to keep it in a schema of its own). Its
schema is the chain of Alembic revisions in `lab_migrations/versions`, run
without an env.py straight on one psycopg connection, recorded in the table
`lab_schema_version`; only `upgrade` changes it (`rigside lab init`).
Readers and the sync refuse a database that is not at this rigside's head
revision, with a one-line `LabError`. Upgrades of one schema run one at a
time (a transaction-scoped advisory lock): a second `lab init` finds it
current. A server that does not answer, or refuses the connection, is a
`LabUnreachable` naming the URL without any password.
"""

from __future__ import annotations

from pathlib import Path
from urllib.parse import urlsplit, urlunsplit

VERSION_TABLE = "lab_schema_version"
HEAD = "lab_0001"  # the newest revision in lab_migrations/versions (a test checks it against Alembic's head)
_SCRIPTS = Path(__file__).with_name("lab_migrations")
CONNECT_TIMEOUT_S = 5
# advisory lock namespaces: "RSD1" one PC's sync, "RSD2" the animal registry, "RSD3" a schema upgrade.
# Advisory locks are database-wide: the second key names the lab's schema (and the thing locked), so labs
# in schemas of one database (and a PC number 1 in each) never wait for each other
LOCK_SYNC, LOCK_REGISTRY, LOCK_UPGRADE = 0x52534431, 0x52534432, 0x52534433
IN_THIS_LAB = "hashtext(current_schema() || '/' || %s)"


class LabError(Exception):
    """The lab database cannot be used as it is; the message says why in one line."""


class LabUnreachable(LabError):
    """The lab server did not answer (or refused the connection)."""


class LabBusy(LabError):
    """The lab answered but cannot take this work now (another sync of the same PC holds it); try again later."""


def shown(url: str) -> str:
    """The URL without its password, for messages."""
    parts = urlsplit(url)
    if parts.password is None:
        return url
    host = parts.hostname or ""
    netloc = f"{parts.username}@{host}" + (f":{parts.port}" if parts.port else "")
    return urlunsplit((parts.scheme, netloc, parts.path, parts.query, parts.fragment))


def check_url(url: str) -> str:
    """The URL if it names a PostgreSQL database, else a LabError saying what is expected."""
    if not isinstance(url, str) or urlsplit(url).scheme not in ("postgresql", "postgres"):
        raise LabError(f"expected a URL postgresql://user@host/database, got {shown(url) if isinstance(url, str) else url!r}")
    return url


def lab_driver():
    """psycopg, or a LabError saying how to install the `lab` extra (psycopg and Alembic)."""
    from importlib.util import find_spec

    if find_spec("psycopg") is None or find_spec("alembic") is None:
        raise LabError("the lab database needs psycopg and alembic: pip install 'rigside[lab]'")
    import psycopg

    return psycopg


def connect(url: str):
    """A psycopg connection to the lab (not autocommit, TCP keepalives on both ends), or LabUnreachable."""
    psycopg = lab_driver()
    try:
        conn = psycopg.connect(check_url(url), connect_timeout=CONNECT_TIMEOUT_S, keepalives=1,
                               keepalives_idle=30, keepalives_interval=10, keepalives_count=3)
    except psycopg.OperationalError as exc:
        reason = " ".join(str(exc).split()) or type(exc).__name__
        raise LabUnreachable(f"lab server {shown(url)} unreachable: {reason}") from None
    try:  # the server, too, lets go of a client the network lost within about a minute
        for name, value in (("idle", 30), ("interval", 10), ("count", 3)):
            conn.execute(f"SET tcp_keepalives_{name} = {value}")
        conn.commit()
        return conn
    except psycopg.OperationalError as exc:
        conn.close()
        raise LabUnreachable(f"lab server {shown(url)}: {' '.join(str(exc).split())}") from None


def _script():
    from alembic.script import ScriptDirectory

    return ScriptDirectory(str(_SCRIPTS), version_locations=[str(_SCRIPTS / "versions")])


def head_revision() -> str:
    """Alembic's head of the revision files (loads Alembic; readers compare with HEAD instead)."""
    return _script().get_current_head()


def current_revision(conn) -> str | None:
    """The revision the database is at (None: never initialised)."""
    exists = conn.execute("SELECT to_regclass(%s) IS NOT NULL", (VERSION_TABLE,)).fetchone()[0]
    if not exists:
        return None
    row = conn.execute(f"SELECT version_num FROM {VERSION_TABLE}").fetchone()
    return None if row is None else row[0]


def require_current(conn, url: str) -> None:
    """LabError unless the lab's schema is at this rigside's head revision."""
    current = current_revision(conn)
    if current is None:
        raise LabError(f"{shown(url)} has no rigside lab schema: run `rigside lab init --lab URL` once")
    if current != HEAD:
        raise LabError(f"{shown(url)} is at lab schema {current}, this rigside needs {HEAD}: "
                       "run `rigside lab init --lab URL` (a newer server schema needs a newer rigside)")


def upgrade(url: str) -> tuple[str | None, str]:
    """Bring the lab's schema to the head revision in one transaction; return (before, after)."""
    psycopg = lab_driver()
    import sqlalchemy
    from alembic.operations import Operations
    from alembic.runtime.migration import MigrationContext

    script = _script()
    check_url(url)
    engine = sqlalchemy.create_engine("postgresql+psycopg://", creator=lambda: connect(url),
                                      poolclass=sqlalchemy.pool.NullPool)
    try:
        with engine.begin() as connection:
            # two `lab init` at once: the second waits here, then finds the schema current (without the
            # lock it failed on a duplicate catalogue entry while creating the version table)
            connection.exec_driver_sql(f"SELECT pg_advisory_xact_lock(%s, {IN_THIS_LAB})", (LOCK_UPGRADE, "schema"))
            context = MigrationContext.configure(
                connection, opts={"version_table": VERSION_TABLE, "transactional_ddl": True,
                                  "fn": lambda rev, _ctx: script._upgrade_revs("head", rev)})
            before = context.get_current_revision()
            if before is not None and before not in {r.revision for r in script.walk_revisions()}:
                raise LabError(f"{shown(url)} is at lab schema {before}, newer than this rigside knows: "
                               "upgrade rigside")
            with Operations.context(context):
                context.run_migrations()
            return before, context.get_current_revision() or before or ""
    except (sqlalchemy.exc.OperationalError, psycopg.OperationalError) as exc:
        raise LabUnreachable(f"lab server {shown(url)}: {' '.join(str(exc).split())[:300]}") from None
    except sqlalchemy.exc.DBAPIError as exc:
        raise LabError(f"{shown(url)}: cannot create the lab schema ({' '.join(str(exc.orig).split())})") from None
    finally:
        engine.dispose()
