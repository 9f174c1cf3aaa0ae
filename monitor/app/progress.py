"""Progress of a long command on a terminal: a bar with counts, rate and time left.

Rule: a command that can run longer than two seconds (import, export) counts
its work through `Progress`; on a terminal that is a tqdm bar on stderr,
redrawn at most ten times a second; when stderr is not a terminal, or with
`--quiet`, nothing is drawn, so logs and pipes stay clean. Lines a command
prints while a bar is up go through `Progress.say`, which keeps the bar
below them. The closing summary line is the command's own (it prints it
whether or not a bar was shown).
"""

from __future__ import annotations

import sys
from typing import TextIO


class Progress:
    """Work done of `total` units; a context manager that closes the bar."""

    def __init__(self, total: int, unit: str, label: str, quiet: bool = False, stream: TextIO | None = None) -> None:
        self.stream = stream if stream is not None else sys.stderr
        self.shown = not quiet and _is_terminal(self.stream)
        self.done = 0
        self.total = total
        self._bar = None
        if self.shown:
            from tqdm import tqdm  # lazy: only a terminal needs it

            self._bar = tqdm(total=total, unit=unit, desc=label, file=self.stream, mininterval=0.1,
                             unit_scale=total >= 100_000, dynamic_ncols=True, leave=False)

    def advance(self, amount: int = 1) -> None:
        """Count `amount` more units done."""
        self.done += amount
        if self._bar is not None:
            self._bar.update(amount)

    def say(self, line: str) -> None:
        """Print a line on the command's stream without breaking the bar."""
        if self._bar is not None:
            self._bar.write(line, file=self.stream)
        else:
            print(line, file=self.stream)

    def close(self) -> None:
        if self._bar is not None:
            self._bar.close()
            self._bar = None

    def __enter__(self) -> Progress:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


def _is_terminal(stream: TextIO) -> bool:
    try:
        return stream.isatty()
    except (AttributeError, ValueError):  # a closed or replaced stream
        return False
