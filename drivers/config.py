"""TOML configuration files that name the file, line and key of every mistake.

Rule: a bad config is refused with `ConfigError`, whose message reads
`FILE:LINE: [section] key: what is wrong`. Python's tomllib gives no
positions for values, so `TomlFile` finds the line of a table or key in the
text itself (good enough for the flat, hand-written files rigside reads).
Pure: it parses text it is given; reading the file is the caller's business.
"""

from __future__ import annotations

import re
import tomllib
from typing import Any


class ConfigError(ValueError):
    """A configuration mistake, located in its file."""

    def __init__(self, path: str, line: int | None, key: str, message: str) -> None:
        self.path, self.line, self.key, self.message = path, line, key, message
        where = f"{path}:{line}" if line else path
        super().__init__(f"{where}: {key}: {message}" if key else f"{where}: {message}")


_TABLE = re.compile(r"^\s*\[\[?\s*([^\]]+?)\s*\]\]?\s*(#.*)?$")
_KEY = re.compile(r"""^\s*("([^"]+)"|'([^']+)'|[A-Za-z0-9_\-]+)\s*=""")


class TomlFile:
    """Parsed TOML plus enough of its text to point at lines."""

    def __init__(self, text: str, path: str = "<config>") -> None:
        self.path = path
        try:
            self.data: dict[str, Any] = tomllib.loads(text)
        except tomllib.TOMLDecodeError as exc:
            match = re.search(r"line (\d+)", str(exc))
            raise ConfigError(path, int(match.group(1)) if match else None, "", f"not valid TOML ({exc})") from None
        self._lines: dict[tuple[str, str], int] = {}
        table = ""
        for number, line in enumerate(text.splitlines(), start=1):
            found = _TABLE.match(line)
            if found:
                table = found.group(1).strip().strip('"')
                self._lines.setdefault((table, ""), number)
                continue
            key = _KEY.match(line)
            if key:
                name = key.group(2) or key.group(3) or key.group(1)
                self._lines.setdefault((table, name), number)

    def line_of(self, table: str, key: str = "") -> int | None:
        """Line of `key` in `[table]` (or of the table header); None if absent."""
        return self._lines.get((table, key)) or self._lines.get((table, ""))

    def error(self, table: str, key: str, message: str) -> ConfigError:
        """A ConfigError pointing at `[table] key` (or the table when key is absent)."""
        label = f"[{table}] {key}".strip() if table else key
        return ConfigError(self.path, self.line_of(table, key), label, message)

    def table(self, name: str, required: bool = True) -> dict[str, Any]:
        """The table `[name]`; an error naming it when required and missing."""
        value = self.data.get(name)
        if value is None:
            if required:
                raise ConfigError(self.path, None, f"[{name}]", "missing table")
            return {}
        if not isinstance(value, dict):
            raise self.error("", name, "must be a table")
        return value

    def check_keys(self, table: str, allowed: set[str]) -> None:
        """Refuse keys of `[table]` that are not in `allowed` (typos)."""
        for key in self.table(table, required=False):
            if key not in allowed:
                raise self.error(table, key, f"unknown key (expected one of: {', '.join(sorted(allowed))})")

    def get(self, table: str, key: str, kind: type | tuple[type, ...], default: Any = ..., check=None) -> Any:
        """`[table] key` of type `kind`; missing and wrong values name the line.

        `check(value)` may return a message that refuses the value.
        """
        values = self.table(table, required=default is ...)
        if key not in values:
            if default is ...:
                raise self.error(table, key, "missing key")
            return default
        value = values[key]
        kinds = kind if isinstance(kind, tuple) else (kind,)
        if isinstance(value, bool) and bool not in kinds:
            ok = False
        else:
            ok = isinstance(value, kinds)
        if not ok:
            names = " or ".join(k.__name__ for k in kinds)
            raise self.error(table, key, f"expected {names}, got {value!r}")
        if check is not None:
            problem = check(value)
            if problem:
                raise self.error(table, key, problem)
        return value
