"""Guards the PySide6 range: 6.12.0 on Python 3.11 lowers None's refcount on every
void Qt call and the interpreter soon aborts with "none_dealloc" (measured on
this machine type, ../shared/STACK-NOTES.md); the declared range must exclude it,
admit the release developed on (6.11.3) and the floor .ci/floors.txt tests."""

from __future__ import annotations

import sys
from importlib.metadata import requires, version
from pathlib import Path

from packaging.requirements import Requirement
from packaging.version import Version

FLOORS = Path(__file__).resolve().parents[1] / ".ci" / "floors.txt"


def declared(name: str) -> list[Requirement]:
    """rigside's installed requirements on `name`, extras included (packaging reads them, PEP 440)."""
    found = [Requirement(r) for r in requires("rigside") or []]
    return [r for r in found if r.name.lower() == name.lower()]


def floor(name: str) -> str:
    for line in FLOORS.read_text().splitlines():
        if line.split("==")[0].strip().lower() == name.lower():
            return line.split("==")[1].strip()
    raise AssertionError(f"{name} has no floor in {FLOORS}")


def test_pyside6_range_excludes_the_crashing_release_and_admits_the_tested_ones():
    (requirement,) = declared("PySide6-Essentials")
    spec = requirement.specifier
    assert "6.12.0" not in spec
    assert "6.11.3" in spec and floor("PySide6-Essentials") in spec
    assert version("PySide6-Essentials") != "6.12.0"


def test_every_floor_is_the_lower_end_of_its_declared_range():
    # the floors file pins the bottom of each declared range (PEP 440 comparison by packaging)
    for name in ("PySide6-Essentials", "pyqtgraph", "numpy", "scipy", "pyserial", "platformdirs", "pynwb",
                 "tqdm"):
        requirements = declared(name)
        assert requirements, name
        for requirement in requirements:
            low = [Version(s.version) for s in requirement.specifier if s.operator == ">="]
            assert low == [Version(floor(name))], f"{name}: {requirement} against the floor {floor(name)}"


def test_void_qt_calls_do_not_drop_none_refcount():
    from PySide6.QtCore import QObject

    obj = QObject()
    before = sys.getrefcount(None)
    for i in range(500):
        obj.setObjectName(f"tile{i % 7}")  # a Qt method that returns nothing
    after = sys.getrefcount(None)
    # 6.12.0 would lose one reference per call: 500 here. Threads of earlier tests still ending
    # can move None's count by a few dozen, so allow 100.
    assert after >= before - 100
