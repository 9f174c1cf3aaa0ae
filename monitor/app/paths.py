"""Where rigside keeps its files on this PC.

Rule: the default database lives in the user data directory that platformdirs
names for "rigside"; every command's `--db` overrides it. Nothing is created
until a command writes.
"""

from __future__ import annotations

from pathlib import Path


def default_db_path() -> Path:
    """The per-user default database file."""
    from platformdirs import user_data_dir

    return Path(user_data_dir("rigside", appauthor=False)) / "rigside.sqlite3"


def add_db_argument(parser) -> None:
    """The shared `--db` option."""
    parser.add_argument(
        "--db",
        type=Path,
        default=None,
        help="database file (default: the user data directory's rigside.sqlite3)",
    )


def resolve_db(value: Path | None) -> Path:
    """`--db` as given, or the default."""
    return value if value is not None else default_db_path()
