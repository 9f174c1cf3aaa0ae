"""The first-run check: no display says how to run headless, missing system libraries are named,
and `rigside demo` exits 2 with one line instead of letting Qt abort the interpreter."""

from __future__ import annotations

import ctypes.util
import os
import re
import subprocess
import sys
from pathlib import Path

import pytest

from monitor.app.first_run import BASE, XCB, display_problem, loadable

LINUX_X = {"DISPLAY": ":0"}


def test_no_display_points_to_headless():
    problem = display_problem(False, environ={}, platform="linux", can_load=lambda s: True)
    assert problem is not None and "--headless" in problem and "no display" in problem


def test_only_the_missing_libraries_are_named_with_their_packages():
    absent = {"libxcb-icccm.so.4", "libxcb-keysyms.so.1"}
    problem = display_problem(False, environ=LINUX_X, platform="linux", can_load=lambda s: s not in absent,
                              x_answers=lambda: True)
    assert problem is not None
    named = problem.split(": ", 1)[1].split(" (")[0].split()
    assert named == ["libxcb-icccm4", "libxcb-keysyms1"]     # not libxcb-cursor0, which is present
    assert "sudo apt install libxcb-icccm4 libxcb-keysyms1" in problem


def test_offscreen_needs_only_the_base_libraries():
    problem = display_problem(True, environ={}, platform="linux", can_load=lambda s: s not in XCB)
    assert problem is None
    problem = display_problem(True, environ={}, platform="linux", can_load=lambda s: s != "libEGL.so.1")
    assert problem is not None and "libegl1" in problem and "offscreen" in problem


def test_no_x_server_on_the_display():
    problem = display_problem(False, environ=LINUX_X, platform="linux", can_load=lambda s: True,
                              x_answers=lambda: False)
    assert problem is not None and "DISPLAY=:0" in problem and "--headless" in problem


@pytest.mark.parametrize("platform", ["win32", "darwin"])
def test_windows_and_macos_need_nothing_beyond_the_wheels(platform):
    assert display_problem(False, environ={}, platform=platform, can_load=lambda s: False) is None


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="the Linux dynamic loader")
def test_the_loader_agrees_with_ldconfig():
    # ctypes.util.find_library asks ldconfig's cache (Python's ctypes docs): an outside opinion of presence
    for soname in list(BASE) + list(XCB):
        name = soname[3:].split(".so")[0]
        if ctypes.util.find_library(name) == soname:
            assert loadable(soname), soname


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="X11 display handling is Linux's")
def test_demo_without_a_display_exits_2_with_one_line(tmp_path):
    env = {k: v for k, v in os.environ.items() if k not in ("DISPLAY", "WAYLAND_DISPLAY", "QT_QPA_PLATFORM")}
    result = subprocess.run([sys.executable, "-m", "monitor.app", "demo", "--folder", str(tmp_path)],
                            capture_output=True, text=True, timeout=120, env=env)
    assert result.returncode == 2
    assert result.stderr.count("\n") == 1 and "--headless" in result.stderr, result.stderr


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="X11 display handling is Linux's")
def test_demo_on_a_display_names_what_this_machine_lacks(tmp_path):
    # which X11 libraries this machine lacks, by ldconfig's cache (ctypes.util.find_library)
    lacking = sorted(package for soname, package in XCB.items()
                     if ctypes.util.find_library(soname[3:].split(".so")[0]) is None)
    env = {k: v for k, v in os.environ.items() if k not in ("WAYLAND_DISPLAY", "QT_QPA_PLATFORM")}
    env["DISPLAY"] = ":97"          # no X server listens there
    result = subprocess.run([sys.executable, "-m", "monitor.app", "demo", "--folder", str(tmp_path)],
                            capture_output=True, text=True, timeout=120, env=env)
    assert result.returncode == 2 and result.stderr.count("\n") == 1, result.stderr
    if lacking:
        assert f"sudo apt install {' '.join(lacking)})" in result.stderr
    else:
        assert "no X server answers on DISPLAY=:97" in result.stderr


def test_the_readme_and_install_page_list_exactly_the_libraries_checked():
    # the lists a new lab member installs from must be the ones the check names (and vice versa)
    root = Path(__file__).resolve().parents[2]
    checked = set(BASE.values()) | set(XCB.values())
    for doc in ("README.md", "docs/install.md"):
        text = root.joinpath(doc).read_text(encoding="utf-8")
        section = text[text.index("libegl1"):text.index("libxkbcommon-x11-0") + len("libxkbcommon-x11-0")]
        assert set(re.findall(r"lib[a-z0-9.+-]*[a-z0-9]", section)) == checked, doc
