"""Guards the PySide6 pin: 6.12.0 on Python 3.11 lowers None's refcount on every
void Qt call and the interpreter soon aborts with "none_dealloc" (measured on
this machine type, ../shared/STACK-NOTES.md); 6.11.3 is fine."""

from __future__ import annotations

import sys
from importlib.metadata import version


def test_pyside6_is_the_pinned_version():
    assert version("PySide6-Essentials") == "6.11.3"


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
