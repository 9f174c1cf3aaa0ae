"""SVG icons of rigside's own, shipped as package data.

Rule: icons are plain SVG files in this folder, named for what they show;
`icon_path(name)` finds one whether rigside runs from a checkout or an install.
"""

from __future__ import annotations

from importlib.resources import files
from pathlib import Path


def icon_path(name: str) -> Path:
    """Path of `NAME.svg`; FileNotFoundError names the icon when it is missing."""
    path = Path(str(files(__name__).joinpath(f"{name}.svg")))
    if not path.is_file():
        raise FileNotFoundError(f"icon {name!r} is not in {path.parent}")
    return path
