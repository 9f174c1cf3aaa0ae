"""The lab's settings file: where it is, and its `[care]` thresholds, for the CLI and the window alike.

Rule: `--settings FILE` names the file; without it, `settings.toml` in the
user config directory that platformdirs names for "rigside" is read when it
exists, else the defaults apply. A file that cannot be read or holds a
mistake is refused with one message naming the file, line and key (through
drivers.config.TomlFile / ConfigError), never half-used. Advisory: the
approved animal-use protocol, the animal-care committee and the veterinarian
set the limits.
"""

from __future__ import annotations

import argparse
from pathlib import Path

from monitor.core.care.ledger import CareConfig


def default_settings_path() -> Path:
    """The per-user settings file (it may not exist)."""
    from platformdirs import user_config_dir

    return Path(user_config_dir("rigside", appauthor=False)) / "settings.toml"


def add_settings_argument(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--settings", type=Path, default=None,
                        help="lab settings TOML with a [care] table (default: the user config directory's "
                             "settings.toml, when it exists)")


def settings_path(value: Path | None) -> Path | None:
    """`--settings` as given, else the default file when it exists, else None (defaults)."""
    if value is not None:
        return value
    default = default_settings_path()
    return default if default.is_file() else None


def care_config(path: Path | None) -> CareConfig:
    """The `[care]` table of a settings file (defaults without one); ValueError names file, line and key."""
    if path is None:
        return CareConfig()
    import tomllib

    from drivers.config import ConfigError, TomlFile
    from monitor.core.care.ledger import parse_care

    try:
        doc = TomlFile(Path(path).read_text(encoding="utf-8"), str(path))
        return parse_care(doc.data.get("care", {}), doc)
    except OSError as exc:
        raise ValueError(f"cannot read {path} ({exc.strerror or exc})") from None
    except (ConfigError, tomllib.TOMLDecodeError) as exc:
        raise ValueError(str(exc)) from None


LAB_ENV = "RIGSIDE_LAB"


def lab_url(given: str | None, settings: Path | None = None) -> str | None:
    """The lab database's URL: `--lab`, else $RIGSIDE_LAB, else `[lab] url` of the settings file, else None.

    A settings file that cannot be read, or whose `[lab] url` is not text, is a ValueError naming it.
    """
    import os

    if given:
        return given
    if os.environ.get(LAB_ENV):
        return os.environ[LAB_ENV]
    path = settings_path(settings)
    if path is None:
        return None
    import tomllib

    from drivers.config import ConfigError, TomlFile
    try:
        doc = TomlFile(Path(path).read_text(encoding="utf-8"), str(path))
    except OSError as exc:
        raise ValueError(f"cannot read {path} ({exc.strerror or exc})") from None
    except (ConfigError, tomllib.TOMLDecodeError) as exc:
        raise ValueError(str(exc)) from None
    url = doc.data.get("lab", {}).get("url")
    if url is not None and not isinstance(url, str):
        raise ValueError(str(doc.error("lab", "url", f"expected the lab's URL as text, got {url!r}")))
    return url or None


def set_lab_url(path: Path, url: str) -> None:
    """Write `[lab] url` into the settings file (made if absent), the rest of the file left as it was.

    An empty url removes the line. The new text is checked as TOML before it replaces the file."""
    import json
    import os
    import re
    import tomllib

    text = path.read_text(encoding="utf-8") if path.is_file() else ""
    lines = text.splitlines()
    entry = [f"url = {json.dumps(url)}"] if url else []  # a JSON string is a TOML basic string
    header = next((i for i, line in enumerate(lines) if re.match(r"^\s*\[\s*lab\s*\]\s*(#.*)?$", line)), None)
    if header is None:
        lines += ([""] if lines else []) + (["[lab]", *entry] if entry else [])
    else:
        end = next((i for i in range(header + 1, len(lines)) if re.match(r"^\s*\[", lines[i])), len(lines))
        found = next((i for i in range(header + 1, end) if re.match(r"^\s*url\s*=", lines[i])), None)
        if found is None:
            lines[header + 1:header + 1] = entry
        else:
            lines[found:found + 1] = entry
    new = "\n".join(lines) + "\n"
    tomllib.loads(new)
    path.parent.mkdir(parents=True, exist_ok=True)
    scratch = path.with_name(path.name + ".new")
    scratch.write_text(new, encoding="utf-8")
    os.replace(scratch, path)


EXPORT_KEYS = {"institution": str, "lab": str, "experiment_description": str, "keywords": list}


def export_settings(path: Path | None) -> dict:
    """The `[export]` table of a settings file (NWB file metadata: EXPORT_KEYS); ValueError names file and key."""
    if path is None:
        return {}
    import tomllib

    from drivers.config import ConfigError, TomlFile

    try:
        doc = TomlFile(Path(path).read_text(encoding="utf-8"), str(path))
        table = doc.data.get("export", {})
        for key, value in table.items():
            kind = EXPORT_KEYS.get(key)
            if kind is None:
                raise doc.error("export", key, f"unknown key (expected one of: {', '.join(EXPORT_KEYS)})")
            if not isinstance(value, kind) or (kind is list and not all(isinstance(v, str) for v in value)):
                raise doc.error("export", key, "expected a list of texts" if kind is list else "expected a text")
        return dict(table)
    except OSError as exc:
        raise ValueError(f"cannot read {path} ({exc.strerror or exc})") from None
    except (ConfigError, tomllib.TOMLDecodeError) as exc:
        raise ValueError(str(exc)) from None
