"""Shared test set-up: Qt offscreen, and the `--long` switch for reliability runs."""

from __future__ import annotations

import os

import pytest

os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")


def pytest_addoption(parser: pytest.Parser) -> None:
    parser.addoption("--long", action="store_true", default=False, help="run the long reliability suite")


def pytest_collection_modifyitems(config: pytest.Config, items: list[pytest.Item]) -> None:
    if config.getoption("--long"):
        return
    skip = pytest.mark.skip(reason="long run: give --long")
    for item in items:
        if "long" in item.keywords:
            item.add_marker(skip)
