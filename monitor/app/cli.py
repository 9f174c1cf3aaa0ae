"""The `rigside` command line: one argparse subcommand per job.

Rule: this module only parses. Each subcommand lives in its own module of
`monitor.app.commands` exposing `add_arguments(parser)` and `run(args) -> int`;
those modules import their heavy dependencies (Qt, scipy, the store) inside
`run`, so `rigside record` never loads Qt or scipy. Bad input anywhere gives
one line `rigside CMD: error: ...` on stderr and exit code 2; a runtime fault
gives one line `rigside CMD: failed: ...` and exit code 1, never a traceback. Plain
`rigside`, with no command, opens the window (`rigside window`).
"""

from __future__ import annotations

import argparse
import importlib
import os
import sys
from typing import Sequence

from monitor.app.errors import UsageError, plain_error

COMMANDS: dict[str, tuple[str, str]] = {
    "window": ("monitor.app.commands.window", "the window for this PC's rigs (also plain `rigside`)"),
    "demo": ("monitor.app.commands.demo", "simulated rigs on pseudo-terminals and the full window"),
    "record": ("monitor.app.commands.record", "headless acquisition from one source into the store"),
    "import": ("monitor.app.commands.import_files", "import recorded session files"),
    "report": ("monitor.app.commands.report", "per-animal summary"),
    "export": ("monitor.app.commands.export", "events or trials to CSV, or everything to NWB"),
    "decide": ("monitor.app.commands.decide", "record a person's eligibility decision"),
    "assign": ("monitor.app.commands.assign", "draw an animal's group at random and record it; reveal a blinding key"),
    "log": ("monitor.app.commands.log", "check the decision log"),
    "care": ("monitor.app.commands.care", "care log: weights, supplements, notes, the daily care sheet"),
    "unattended": ("monitor.app.commands.unattended", "a box's runs with nobody checked in; give one to an animal"),
}


class OneLineParser(argparse.ArgumentParser):
    """argparse that reports a bad argument in one line and exits 2."""

    def error(self, message: str) -> None:  # type: ignore[override]
        sys.stderr.write(f"{self.prog}: error: {message}\n")
        raise SystemExit(2)


def build_parser() -> argparse.ArgumentParser:
    parser = OneLineParser(prog="rigside", description="Training monitor for operant boxes.")
    sub = parser.add_subparsers(dest="command", required=True, parser_class=OneLineParser)
    for name, (module_name, help_text) in COMMANDS.items():
        module = _command_module(module_name)
        if module is None:
            continue
        command = sub.add_parser(name, help=help_text, description=help_text)
        module.add_arguments(command)
        command.set_defaults(_module=module)
    return parser


def _command_module(module_name: str):
    try:
        return importlib.import_module(module_name)
    except ModuleNotFoundError as exc:
        if exc.name == module_name:
            return None  # that command is not built yet
        raise


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    words = list(sys.argv[1:] if argv is None else argv)
    args = parser.parse_args(words or ["window"])  # plain `rigside` opens the window
    try:
        return int(args._module.run(args) or 0)
    except UsageError as exc:
        sys.stderr.write(f"rigside {args.command}: error: {exc}\n")
        return 2
    except KeyboardInterrupt:
        return 130
    except BrokenPipeError:
        # the reader went away (`rigside report --json | head`): no traceback; Python's documented recipe
        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        return 1
    except Exception as exc:  # noqa: BLE001 - a runtime fault: one plain line, exit 1, never a traceback
        sys.stderr.write(f"rigside {args.command}: failed: {plain_error(exc)}\n")
        return 1


if __name__ == "__main__":
    raise SystemExit(main())
