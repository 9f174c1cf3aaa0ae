"""Shared test set-up: Qt offscreen, the shared fixtures, the `--long` switch and the `slow` marker.

Shared fixtures and helpers live in tests/fixtures/ (importable as `fixtures.*`:
pyproject.toml puts tests/ on the path): protocol TOML (`fixtures.protocols`),
simulated sessions and histories, and `wait_for` (`fixtures.sessions`),
stores made through `rigside import` (`fixtures.stores`), pty boards, a subprocess's
stderr and `rigside` runs (`fixtures.devices`).
"""

from __future__ import annotations

import os

import pytest

os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")

pytest_plugins = ["fixtures.devices", "fixtures.protocols", "fixtures.sessions", "fixtures.stores"]


def pytest_addoption(parser: pytest.Parser) -> None:
    parser.addoption("--long", action="store_true", default=False, help="run the long reliability suite")


def pytest_collection_modifyitems(config: pytest.Config, items: list[pytest.Item]) -> None:
    if config.getoption("--long"):
        return
    skip = pytest.mark.skip(reason="long run: give --long")
    for item in items:
        if "long" in item.keywords:
            item.add_marker(skip)


# --- the lab database: a real PostgreSQL, one fresh schema per test -----------------------------------

LAB_DEFAULT = "postgresql://postgres@127.0.0.1:5432/test"


@pytest.fixture
def lab_url():
    """A URL whose search_path is a fresh, empty schema on $RIGSIDE_TEST_PG (dropped afterwards).

    Skips, saying why, when no server answers; fails instead when RIGSIDE_REQUIRE_PG=1 (.ci/run sets it
    when a server answers, so these tests cannot be skipped silently there)."""
    import uuid

    base = os.environ.get("RIGSIDE_TEST_PG", LAB_DEFAULT)
    try:
        import psycopg

        admin = psycopg.connect(base, autocommit=True, connect_timeout=3)
    except Exception as exc:  # ImportError or any connection failure: the reason is reported
        reason = f"no PostgreSQL server for the lab tests at {base} ({type(exc).__name__}: {exc}); set RIGSIDE_TEST_PG"
        if os.environ.get("RIGSIDE_REQUIRE_PG") == "1":
            pytest.fail(reason + " (RIGSIDE_REQUIRE_PG=1: a server was expected)")
        pytest.skip(reason)
    schema = f"rigside_test_{uuid.uuid4().hex[:12]}"
    admin.execute(f"CREATE SCHEMA {schema}")
    joiner = "&" if "?" in base else "?"
    try:
        yield f"{base}{joiner}options=-csearch_path%3D{schema}&application_name={schema}"
    finally:
        admin.execute(f"SELECT pg_terminate_backend(pid) FROM pg_stat_activity WHERE application_name = %s "
                      "AND pid <> pg_backend_pid()", (schema,))
        admin.execute(f"DROP SCHEMA {schema} CASCADE")
        admin.close()
