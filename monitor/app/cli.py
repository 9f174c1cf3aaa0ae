"""The `rigside` command line: one argparse subcommand per job.

Rule: this module only parses. Each subcommand lives in its own module of
`monitor.app.commands` exposing `add_arguments(parser)` and `run(args) -> int`;
those modules import their heavy dependencies (Qt, scipy, the store) inside
`run`, so `rigside record` never loads Qt or scipy. Bad input anywhere gives
one line `rigside CMD: error: ...` on stderr and exit code 2; a damaged
database found mid-command is exit 2 too, and any other fault one line and
exit 1 as `rigside CMD: failed: ...` (the traceback only with
RIGSIDE_TRACEBACK=1), never a traceback. Plain
`rigside`, with no command, opens the window (`rigside window`); `rigside
--version` prints the installed version.
"""

from __future__ import annotations

import argparse
import importlib
import os
import sys
from typing import Sequence

from monitor.app.errors import Fault, UsageError, plain_error

COMMANDS: dict[str, tuple[str, str]] = {
    "window": ("monitor.app.commands.window", "the window for this PC's rigs (also plain `rigside`)"),
    "demo": ("monitor.app.commands.demo", "simulated rigs through the real serial path and the full window"),
    "record": ("monitor.app.commands.record", "headless acquisition from one source into the store"),
    "import": ("monitor.app.commands.import_files", "import recorded session files"),
    "report": ("monitor.app.commands.report", "per-animal summary"),
    "export": ("monitor.app.commands.export", "events or trials to CSV, or everything to NWB"),
    "decide": ("monitor.app.commands.decide", "record a person's eligibility decision"),
    "assign": ("monitor.app.commands.assign", "draw an animal's group at random and record it; reveal a blinding key"),
    "log": ("monitor.app.commands.log", "check the decision log and the care log"),
    "animal": ("monitor.app.commands.animal", "subject records: add, edit, retire, list animals (changes logged)"),
    "care": ("monitor.app.commands.care", "care log: weights, supplements, notes, the daily care sheet"),
    "backup": ("monitor.app.commands.backup", "a consistent copy of the database, also while recording runs"),
    "lab": ("monitor.app.commands.lab", "the lab database: create or upgrade it, show what it holds, this PC's sync"),
    "sync": ("monitor.app.commands.sync", "push everything new in this PC's store to the lab database"),
    "manipulation": ("monitor.app.commands.manipulation", "record, list or withdraw manipulations; unblind a cohort"),
    "effects": ("monitor.app.commands.effects", "each manipulation's effect against the stage at which it was made"),
    "unattended": ("monitor.app.commands.unattended", "a box's runs with nobody checked in; give one to an animal"),
}


class OneLineParser(argparse.ArgumentParser):
    """argparse that reports a bad argument in one line and exits 2."""

    def error(self, message: str) -> None:  # type: ignore[override]
        sys.stderr.write(f"{self.prog}: error: {message}\n")
        raise SystemExit(2)


class _Version(argparse.Action):
    """`--version`: the installed version, looked up only when asked (pip's metadata costs a start ~20 ms)."""

    def __call__(self, parser: argparse.ArgumentParser, *_: object) -> None:
        print(f"rigside {installed_version()}")
        parser.exit()


def build_parser(command: str | None = None) -> argparse.ArgumentParser:
    """Every command's parser; given one of the commands, only its module is imported and its arguments
    added (the others keep their names and help for `rigside --help`): a command starts ~0.1 s sooner."""
    parser = OneLineParser(prog="rigside", description="Training monitor for operant boxes.")
    parser.add_argument("--version", action=_Version, nargs=0, help="show the installed version and exit")
    sub = parser.add_subparsers(dest="command", required=True, parser_class=OneLineParser)
    for name, (module_name, help_text) in COMMANDS.items():
        if command in COMMANDS and name != command:
            sub.add_parser(name, help=help_text, description=help_text)
            continue
        module = _command_module(module_name)
        if module is None:
            continue
        parsed = sub.add_parser(name, help=help_text, description=help_text)
        module.add_arguments(parsed)
        parsed.set_defaults(_module=module)
    return parser


def installed_version() -> str:
    """rigside's version as installed (pip's metadata)."""
    from importlib.metadata import PackageNotFoundError, version

    try:
        return version("rigside")
    except PackageNotFoundError:
        return "(not installed: run from a source folder)"


def _command_module(module_name: str):
    try:
        return importlib.import_module(module_name)
    except ModuleNotFoundError as exc:
        if exc.name == module_name:
            return None  # that command is not built yet
        raise


def main(argv: Sequence[str] | None = None) -> int:
    words = list(sys.argv[1:] if argv is None else argv) or ["window"]  # plain `rigside` opens the window
    args = build_parser(words[0]).parse_args(words)
    try:
        return int(args._module.run(args) or 0)
    except UsageError as exc:
        text = str(exc).replace("\r", " ").replace("\n", " ")  # one line, whatever a file or library said
        sys.stderr.write(f"rigside {args.command}: error: {text}\n")
        return 2
    except Fault as exc:
        sys.stderr.write(f"rigside {args.command}: {exc}\n")
        return 1
    except KeyboardInterrupt:
        return 130
    except BrokenPipeError:
        # the reader went away (`rigside report --json | head`): no traceback; Python's documented recipe
        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        return 1
    except Exception as exc:  # noqa: BLE001 - every failure is one line (RIGSIDE_TRACEBACK=1 shows the trace)
        if os.environ.get("RIGSIDE_TRACEBACK"):
            raise
        return _fault(args.command, exc)


def _fault(command: str, exc: Exception) -> int:
    """One stderr line for an error no command caught: 2 for a damaged or unusable database, else 1."""
    from monitor.store.connection import Busy, DatabaseError
    from monitor.store.db import StoreError

    if isinstance(exc, StoreError):
        sys.stderr.write(f"rigside {command}: error: --db: {' '.join(str(exc).split())}\n")
        return 2
    if isinstance(exc, Busy) and ("readonly" in str(exc) or "unable to open" in str(exc)):
        sys.stderr.write(f"rigside {command}: error: --db: cannot use the database ({exc}): check that the "
                         "file and its folder exist and can be written\n")
        return 2
    if isinstance(exc, DatabaseError) and not isinstance(exc, Busy):
        sys.stderr.write(f"rigside {command}: error: --db: the database is damaged or unreadable ({exc}); "
                         "restore it from a backup (docs/store.md)\n")
        return 2
    sys.stderr.write(f"rigside {command}: failed: {' '.join(plain_error(exc).split())}\n")
    return 1


if __name__ == "__main__":
    raise SystemExit(main())
