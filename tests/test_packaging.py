"""The installed distribution carries the three packages and the icons.

setuptools' automatic discovery refuses our flat layout, so the packages are
listed by hand and icons/ ships as package data (DEVELOPERS.md, "Pins and
traps"); only a non-editable install (what .ci/run does) proves it.
"""

from __future__ import annotations

import json
import sysconfig
from importlib.metadata import Distribution, distributions
from pathlib import Path

import pytest

from icons import icon_path


def _installed() -> Distribution:
    """rigside's metadata in this environment's site-packages (not a build folder in the checkout)."""
    found = [d for d in distributions(path=[sysconfig.get_paths()["purelib"]]) if d.metadata["Name"] == "rigside"]
    assert found, "rigside is not installed in this environment"
    return found[0]


def _editable() -> bool:
    direct = _installed().read_text("direct_url.json")
    return bool(direct) and json.loads(direct).get("dir_info", {}).get("editable", False)


def test_icon_lookup_finds_the_app_icon():
    assert icon_path("rigside").read_text().lstrip().startswith("<svg")
    with pytest.raises(FileNotFoundError, match="no_such_icon"):
        icon_path("no_such_icon")


@pytest.mark.skipif(_editable(), reason="an editable install has no file list; CI installs non-editable")
def test_non_editable_install_ships_packages_and_icons():
    files = _installed().files or []
    tops = {f.parts[0] for f in files}
    assert {"drivers", "mock_rig", "monitor", "icons"} <= tops
    svgs = [f for f in files if f.parts[0] == "icons" and f.suffix == ".svg"]
    assert svgs and all(f.locate().is_file() for f in svgs)
    assert any(f.name == "wire.py" and f.parts[0] == "drivers" for f in files)
    # every package of the checkout (a folder with __init__.py) is installed, sub-packages included
    root = Path(__file__).resolve().parents[1]
    packages = {p.parent.relative_to(root).as_posix() for top in ("drivers", "mock_rig", "monitor")
                for p in (root / top).rglob("__init__.py")}
    installed = {f.parent.as_posix() for f in files if f.name == "__init__.py"}
    assert packages <= installed, sorted(packages - installed)


def test_the_distribution_carries_the_licence_and_both_entry_points():
    dist = _installed()
    # core metadata 2.4 (PEP 639): License-Expression and License-File, the file under .dist-info/licenses
    assert dist.metadata["License-Expression"] == "MIT"
    assert dist.metadata.get_all("License-File") == ["LICENSE"]
    assert "MIT License" in (dist.read_text("licenses/LICENSE") or "")
    scripts = {(e.group, e.name): e.value for e in dist.entry_points}
    assert scripts[("console_scripts", "rigside")] == "monitor.app.cli:main"
    assert scripts[("gui_scripts", "rigside-window")] == "monitor.app.window.launcher:main"   # no console on Windows
