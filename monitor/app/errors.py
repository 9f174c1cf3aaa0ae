"""Errors a command reports to the person at the terminal.

Rule: `UsageError` is bad input from the command line or a file the person
named; the CLI prints its message as one line and exits 2. Anything else is a
runtime fault: the CLI prints `plain_error` of it as one line and exits 1
(never a traceback, never an "[Errno N]").
"""


class UsageError(Exception):
    """Bad input: the message names the bad argument or file and what to fix."""


class Fault(Exception):
    """A runtime fault outside the input (e.g. a server that does not answer): one line, exit 1."""


def plain_error(exc: BaseException) -> str:
    """An exception as a person reads it: an OS error's own words and its file, never "[Errno N]"."""
    if isinstance(exc, OSError) and exc.strerror:
        where = exc.filename if exc.filename is not None else ""
        return f"{exc.strerror}: {where}" if where else exc.strerror
    return str(exc).strip() or type(exc).__name__
