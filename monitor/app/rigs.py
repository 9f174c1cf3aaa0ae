"""The rigs of this PC, kept in a TOML file so the window opens with them every day.

Rule: one `[[rig]]` table per rig, in the order they were added:
`name`, `source` ("serial" | "file"), `path`, `protocol` (file path), and
optionally `usb_serial`, `mapping` (file path), `valve_ul_per_ms` and
`reset` (serial: false for a board that does not restart when the port opens,
so no header is expected; default true).
Relative paths are relative to the file's folder. `read_rigs` refuses a bad
file with a `ConfigError` naming the file, line and key (a rig twice, a
missing key, a value of the wrong kind, a calibration out of range); a
missing file is an empty list. `append_rig` adds one table at the end and
never rewrites what is there, so comments and hand edits survive. The file
only says where rigs are; what they sent lives in the store. `RigSpec` is
one rig as the window opens it, `load_protocol` reads its protocol file and
`decoder_factory` makes a new line decoder per source (the wire format, or a
lab's mapped format). Reading the rig list loads no Qt.
"""

from __future__ import annotations

import json
import math
from pathlib import Path

from collections.abc import Callable
from typing import Any, NamedTuple

from drivers.config import ConfigError, TomlFile
from drivers.wire import WireDecoder
from monitor.core.protocol import TrainingProtocol, parse_protocol
from monitor.ui.models import RigSetup
from monitor.ui.validation import RIG_NAME, VALVE_RANGE_UL_PER_MS

REQUIRED = ("name", "source", "path", "protocol")
OPTIONAL = ("usb_serial", "mapping", "valve_ul_per_ms", "reset")


class RigSpec(NamedTuple):
    """One rig on this PC: its source and its default protocol."""

    name: str
    kind: str                        # "serial" | "file"
    path: str
    protocol_path: Path
    usb_serial: str | None = None
    mapping_path: Path | None = None
    valve_ul_per_ms: float | None = None
    wait_for_header: bool = True


class LoadedProtocol(NamedTuple):
    """A protocol file as read: the parsed protocol, its text (stored with each session) and its path."""

    protocol: TrainingProtocol
    text: str
    path: Path


def load_protocol(path: Path) -> LoadedProtocol:
    """Read and parse a protocol file (a ConfigError names file, line and key)."""
    text = Path(path).read_text(encoding="utf-8")
    return LoadedProtocol(parse_protocol(text, str(path)), text, Path(path))


def decoder_factory(mapping_path: Path | None) -> Callable[[], Any]:
    """A new line decoder per source: the wire format, or a lab's mapped format."""
    if mapping_path is None:
        return WireDecoder
    from drivers.mapping import MappedDecoder, load_mapping

    mapping = load_mapping(mapping_path)
    return lambda: MappedDecoder(mapping)


def default_rigs_path() -> Path:
    """The per-user rig list (beside the lab's other settings)."""
    from platformdirs import user_config_dir

    return Path(user_config_dir("rigside", appauthor=False)) / "rigs.toml"


def read_rigs(path: Path) -> list[RigSpec]:
    """The rigs listed in `path` (none when it does not exist)."""
    if not path.exists():
        return []
    text = path.read_text(encoding="utf-8")
    config = TomlFile(text, str(path))
    unknown = sorted(set(config.data) - {"rig"})
    if unknown:
        raise config.error(unknown[0], "", "unknown table; this file holds [[rig]] tables only")
    tables = config.data.get("rig", [])
    if not isinstance(tables, list):
        raise config.error("rig", "", "write each rig as its own [[rig]] table")
    blocks = _table_blocks(text.splitlines())
    specs: list[RigSpec] = []
    for table, block in zip(tables, blocks):
        specs.append(_spec(str(path), block, table, path.parent, {s.name for s in specs}))
    return specs


def _table_blocks(lines: list[str]) -> list[list[tuple[int, str]]]:
    """(line number, text) of each [[rig]] table, in order."""
    blocks: list[list[tuple[int, str]]] = []
    for number, line in enumerate(lines, start=1):
        text = line.strip()
        if text.startswith("[[rig]]"):
            blocks.append([(number, text)])
        elif text.startswith("["):
            blocks.append([])      # another table: its lines belong to no rig
        elif blocks:
            blocks[-1].append((number, text))
    return [b for b in blocks if b]


def _spec(file: str, block: list[tuple[int, str]], table: dict, folder: Path, seen: set[str]) -> RigSpec:
    def fail(key: str, message: str) -> ConfigError:
        line = next((n for n, t in block if t.split("=", 1)[0].strip() == key), block[0][0])
        return ConfigError(file, line, f"[[rig]] {key}", message)

    for key in REQUIRED:
        if not isinstance(table.get(key), str) or not table[key].strip():
            raise fail(key, "needed, as text")
    extra = sorted(set(table) - set(REQUIRED) - set(OPTIONAL))
    if extra:
        raise fail(extra[0], f"unknown key (known: {', '.join(REQUIRED + OPTIONAL)})")
    name = table["name"]
    if not RIG_NAME.match(name):
        raise fail("name", f"{name!r}: use 1-32 letters, digits, '-', '_' or '.'")
    if name in seen:
        raise fail("name", f"{name!r} is listed twice")
    if table["source"] not in ("serial", "file"):
        raise fail("source", f"\"serial\" or \"file\", not {table['source']!r}")
    for key in ("usb_serial", "mapping"):
        if key in table and not isinstance(table[key], str):
            raise fail(key, "expected text")
    if not isinstance(table.get("reset", True), bool):
        raise fail("reset", f"true or false, not {table['reset']!r}")
    valve = table.get("valve_ul_per_ms")
    if valve is not None:
        low, high = VALVE_RANGE_UL_PER_MS
        if isinstance(valve, bool) or not isinstance(valve, (int, float)) or not math.isfinite(valve) \
                or not low <= valve <= high:
            raise fail("valve_ul_per_ms", f"µL per ms of valve opening between {low} and {high}, not {valve!r}")

    def local(text: str) -> Path:
        return Path(text) if Path(text).is_absolute() else folder / text

    path = table["path"] if table["source"] == "serial" else str(local(table["path"]))
    mapping = local(table["mapping"]) if table.get("mapping") else None
    return RigSpec(name, table["source"], path, local(table["protocol"]), table.get("usb_serial") or None,
                   mapping, float(valve) if valve is not None else None, table.get("reset", True))


def append_rig(path: Path, setup: RigSetup) -> None:
    """Add one rig as a new [[rig]] table at the end of `path` (created with its folder if needed)."""
    fields: dict[str, object] = {"name": setup.name, "source": setup.source, "path": setup.path,
                                 "protocol": setup.protocol_path}
    if setup.serial_number:
        fields["usb_serial"] = setup.serial_number
    if setup.mapping_path:
        fields["mapping"] = setup.mapping_path
    if setup.valve_ul_per_ms is not None:
        fields["valve_ul_per_ms"] = setup.valve_ul_per_ms
    if setup.source == "serial" and not setup.reset:
        fields["reset"] = False
    # a JSON string of printable text is a valid TOML basic string
    body = "".join(f"{key} = {json.dumps(value, ensure_ascii=False)}\n" for key, value in fields.items())
    path.parent.mkdir(parents=True, exist_ok=True)
    before = path.read_text(encoding="utf-8") if path.exists() else "# rigside: the rigs of this PC\n"
    path.write_text(before + ("" if before.endswith("\n") else "\n") + "\n[[rig]]\n" + body, encoding="utf-8")
