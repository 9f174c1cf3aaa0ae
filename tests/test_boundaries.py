"""Package boundaries of DESIGN.md, checked on the source by reading every import.

An equivalent of import-linter's forbidden contracts, but it also sees imports
placed inside functions (the lazy ones) and calls of the builtin `open`.
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]

QT = ("PySide6", "shiboken6", "pyqtgraph")
RULES: dict[str, tuple[str, ...]] = {
    # core is pure: no Qt, no ports, no storage, no processes or threads, no files
    "monitor/core": QT + ("serial", "sqlite3", "socket", "subprocess", "multiprocessing", "threading",
                          "io", "pathlib", "drivers.serial", "drivers.tail", "monitor.store", "monitor.ui",
                          "monitor.app"),
    # drivers move bytes only
    "drivers": QT + ("monitor", "sqlite3"),
    # the simulator speaks the wire format and knows nothing of the monitor
    "mock_rig": QT + ("monitor", "sqlite3"),
    # the UI never touches serial ports or drivers
    "monitor/ui": ("serial", "drivers"),
}
NO_OPEN = ("monitor/core",)


def imported_modules(source: str) -> list[tuple[int, str]]:
    """(line, dotted module) for every import statement, at any depth."""
    found = []
    for node in ast.walk(ast.parse(source)):
        if isinstance(node, ast.Import):
            found += [(node.lineno, alias.name) for alias in node.names]
        elif isinstance(node, ast.ImportFrom) and node.level == 0 and node.module:
            found.append((node.lineno, node.module))
            found += [(node.lineno, f"{node.module}.{alias.name}") for alias in node.names]
    return found


def calls_open(source: str) -> list[int]:
    return [n.lineno for n in ast.walk(ast.parse(source))
            if isinstance(n, ast.Call) and isinstance(n.func, ast.Name) and n.func.id == "open"]


def violations(folder: Path, forbidden: tuple[str, ...], no_open: bool) -> list[str]:
    problems = []
    for path in sorted(folder.rglob("*.py")):
        source = path.read_text(encoding="utf-8")
        for line, module in imported_modules(source):
            for banned in forbidden:
                if module == banned or module.startswith(banned + "."):
                    problems.append(f"{path.relative_to(folder.parent)}:{line} imports {module}")
        if no_open:
            problems += [f"{path.name}:{line} calls open()" for line in calls_open(source)]
    return problems


@pytest.mark.parametrize("package", sorted(RULES))
def test_package_respects_its_boundary(package):
    folder = ROOT / package
    assert folder.is_dir(), f"{package} is part of the design card's layout"
    assert violations(folder, RULES[package], package in NO_OPEN) == []


def test_checker_catches_a_stdlib_import_even_when_lazy(tmp_path):
    core = tmp_path / "core"
    core.mkdir()
    (core / "sneaky.py").write_text(
        "import numpy\n\ndef save(rows):\n    import sqlite3\n    from serial.tools import list_ports\n"
        "    with open('x') as f:\n        pass\n"
    )
    found = violations(core, RULES["monitor/core"], no_open=True)
    assert any("imports sqlite3" in v for v in found)
    assert any("imports serial.tools" in v for v in found)
    assert any("calls open()" in v for v in found)
    assert not any("numpy" in v for v in found)


def test_checker_catches_from_import_of_a_forbidden_submodule(tmp_path):
    pkg = tmp_path / "drivers"
    pkg.mkdir()
    (pkg / "bad.py").write_text("from monitor import store\nfrom PySide6.QtCore import QObject\n")
    found = violations(pkg, RULES["drivers"], no_open=False)
    assert len([v for v in found if "monitor" in v]) >= 1 and any("PySide6.QtCore" in v for v in found)
