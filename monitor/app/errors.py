"""Errors a command reports to the person at the terminal.

Rule: `UsageError` is bad input from the command line or a file the person
named; the CLI prints its message as one line and exits 2. Everything else is
a bug or a fault and keeps its traceback.
"""


class UsageError(Exception):
    """Bad input: the message names the bad argument or file and what to fix."""


class Fault(Exception):
    """A runtime fault outside the input (e.g. a server that does not answer): one line, exit 1."""
