"""How the slow-state fraction is said: a point value only where the data support one.

Rule: a figure whose status is "estimated" is stated as its point value (the
median of the interval's draws) with its 90 % interval; any other status is
stated as the word and the interval, with no point value, and the report says
that its `estimate` must not be read alone.  Pure text, no imports: the text
report, the import command and the window all say it the same way.
"""

from __future__ import annotations

SUPPORTED_NOTE = "estimate: the median of the interval's draws; read it with its 90 % interval"
UNSUPPORTED_NOTE = ("estimate must not be read alone: the data do not support a point value; "
                    "read the 90 % interval and the status")


def supported(status: str) -> bool:
    """A point value may be stated and plotted."""
    return status == "estimated"


def fraction_text(estimate: float, low: float, high: float, status: str) -> str:
    """'0.42 (90 % interval 0.35–0.50), estimated' or 'not constrained: no point value (90 % interval 0.00–1.00)'."""
    if supported(status):
        return f"{estimate:.2f} (90 % interval {low:.2f}–{high:.2f}), estimated"
    return f"{status}: no point value (90 % interval {low:.2f}–{high:.2f})"
