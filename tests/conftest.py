"""Shared test set-up: Qt offscreen, the shared fixtures, the `--long` switch and the `slow` marker.

Shared fixtures and helpers live in tests/fixtures/ (importable as `fixtures.*`:
pyproject.toml puts tests/ on the path): protocol TOML (`fixtures.protocols`),
simulated sessions and histories, and `wait_for` (`fixtures.sessions`),
stores made through `rigside import` (`fixtures.stores`).
"""

from __future__ import annotations

import os

import pytest

os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")

pytest_plugins = ["fixtures.protocols", "fixtures.sessions", "fixtures.stores"]


def pytest_addoption(parser: pytest.Parser) -> None:
    parser.addoption("--long", action="store_true", default=False, help="run the long reliability suite")


def pytest_collection_modifyitems(config: pytest.Config, items: list[pytest.Item]) -> None:
    if config.getoption("--long"):
        return
    skip = pytest.mark.skip(reason="long run: give --long")
    for item in items:
        if "long" in item.keywords:
            item.add_marker(skip)
