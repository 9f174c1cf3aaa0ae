"""The lab database as the commands see it: which URL, and its faults as one line and an exit code.

Rule: `rigside lab init` and `rigside sync` take the URL from `--lab`, else
$RIGSIDE_LAB, else `[lab] url` in the settings file (monitor.app.settings);
readers (`report`, `export`, `log verify`) use the lab only when `--lab` is
given. A server that does not answer, or fails a statement (any psycopg
error that reaches here), is a runtime fault (`Fault`: one line on stderr,
exit 1). A lab not set up, a malformed URL or data the
lab refuses is bad input: a `UsageError` naming `--lab` (exit 2).
"""

from __future__ import annotations

from pathlib import Path
from typing import Callable, TypeVar

from monitor.app.errors import Fault, UsageError

T = TypeVar("T")

LAB_HELP = "the lab database, postgresql://user@host/database"


def add_lab_argument(parser, *, reader: bool = False) -> None:
    """The shared `--lab URL` option (for readers: read the lab in place of --db)."""
    parser.add_argument("--lab", metavar="URL",
                        help=f"read {LAB_HELP} in place of --db" if reader else
                        f"{LAB_HELP} (default: $RIGSIDE_LAB, else [lab] url in the settings file)")


def resolve_lab(given: str | None, settings: Path | None = None) -> str:
    """The URL to use, or a UsageError saying where to set it."""
    from monitor.app.settings import lab_url

    try:
        url = lab_url(given, settings)
    except ValueError as exc:
        raise UsageError(f"--settings: {exc}") from None
    if url is None:
        raise UsageError("--lab: give the lab database's URL (or set RIGSIDE_LAB, or [lab] url in the settings file)")
    return url


def lab_call(work: Callable[[], T]) -> T:
    """`work()`, with an unreachable, busy or failing lab as a Fault (exit 1: nothing lost, try later) and other
    lab faults as a UsageError naming --lab."""
    from monitor.store.lab_schema import LabBusy, LabError, LabUnreachable

    try:
        return work()
    except (LabUnreachable, LabBusy) as exc:
        raise Fault(str(exc)) from None
    except LabError as exc:
        raise UsageError(f"--lab: {exc}") from None
    except Exception as exc:
        if not type(exc).__module__.startswith("psycopg"):
            raise
        raise Fault(f"the lab database failed: {' '.join(str(exc).split())}") from None
