"""POSIX pseudo-terminal calls for the simulated boxes: the only home of fcntl, pty, termios and tty.

Rule: this module exists because those four modules are POSIX-only: Windows has
none of them, so everything else in mock_rig imports nothing of them and
imports this module only when a pty output is actually made
(`mock_rig.outputs.pty_available()` says whether that can work here). A new
pty's slave is raw, its line speed starts at a sentinel that any serial open
changes (so the box can tell it was opened), and its master never blocks.
"""

from __future__ import annotations

import fcntl
import os
import pty
import struct
import termios
import tty

SENTINEL_SPEED = termios.B50


def open_pty() -> tuple[int, int, str]:
    """A new raw pty: (master fd, non-blocking; slave fd at the sentinel speed; slave device path)."""
    master, slave = pty.openpty()
    tty.setraw(slave)
    attrs = termios.tcgetattr(slave)
    attrs[4] = attrs[5] = SENTINEL_SPEED
    termios.tcsetattr(slave, termios.TCSANOW, attrs)
    fcntl.fcntl(master, fcntl.F_SETFL, fcntl.fcntl(master, fcntl.F_GETFL) | os.O_NONBLOCK)
    return master, slave, os.ttyname(slave)


def was_opened(slave: int) -> bool:
    """True once a reader opened the device (its open set a line speed other than the sentinel)."""
    return termios.tcgetattr(slave)[4:6] != [SENTINEL_SPEED, SENTINEL_SPEED]


def unread(slave: int) -> int:
    """Bytes waiting on the slave side that no reader has taken yet."""
    return struct.unpack("i", fcntl.ioctl(slave, termios.FIONREAD, b"\0" * 4))[0]
