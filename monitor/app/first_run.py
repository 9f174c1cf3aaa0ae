"""Before the first window: is there a display, and are the system libraries Qt loads there?

Rule: on Linux (and other X11/Wayland systems; not Windows or macOS, where the
wheels carry what Qt needs) Qt aborts the interpreter when it cannot open a
display, and blames one library when several are missing. So the window and
the demo ask here first and turn the answer into one line (exit 2): no
display says how to run headless; missing libraries are named by their
Debian/Ubuntu package. A library counts as present when the dynamic loader
opens its soname. The offscreen platform needs only the base libraries.
"""

from __future__ import annotations

import ctypes
import os
import sys
from collections.abc import Callable, Mapping

# soname -> Debian/Ubuntu package: what Qt's libraries load for any platform (offscreen included)
BASE = {
    "libEGL.so.1": "libegl1", "libGL.so.1": "libgl1", "libX11.so.6": "libx11-6",
    "libfontconfig.so.1": "libfontconfig1", "libfreetype.so.6": "libfreetype6",
    "libxkbcommon.so.0": "libxkbcommon0", "libglib-2.0.so.0": "libglib2.0-0", "libdbus-1.so.3": "libdbus-1-3",
}
# and what the X11 (xcb) platform plugin loads on top
XCB = {
    "libxcb-cursor.so.0": "libxcb-cursor0", "libxcb-icccm.so.4": "libxcb-icccm4",
    "libxcb-keysyms.so.1": "libxcb-keysyms1", "libxcb-image.so.0": "libxcb-image0",
    "libxcb-randr.so.0": "libxcb-randr0", "libxcb-render-util.so.0": "libxcb-render-util0",
    "libxcb-shape.so.0": "libxcb-shape0", "libxcb-shm.so.0": "libxcb-shm0", "libxcb-sync.so.1": "libxcb-sync1",
    "libxcb-util.so.1": "libxcb-util1", "libxcb-xfixes.so.0": "libxcb-xfixes0", "libxcb-xkb.so.1": "libxcb-xkb1",
    "libX11-xcb.so.1": "libx11-xcb1", "libxkbcommon-x11.so.0": "libxkbcommon-x11-0",
}
HEADLESS_HINT = "rigside demo --headless --seconds 20 --screenshot demo.png"


def loadable(soname: str) -> bool:
    """True when the dynamic loader opens `soname`."""
    try:
        ctypes.CDLL(soname)
    except OSError:
        return False
    return True


def x_server_answers() -> bool:
    """True when libX11 can open the display named by DISPLAY."""
    x11 = ctypes.CDLL("libX11.so.6")
    x11.XOpenDisplay.restype = ctypes.c_void_p
    x11.XOpenDisplay.argtypes = [ctypes.c_char_p]
    display = x11.XOpenDisplay(None)
    if not display:
        return False
    x11.XCloseDisplay.argtypes = [ctypes.c_void_p]
    x11.XCloseDisplay(display)
    return True


def display_problem(
    headless: bool,
    environ: Mapping[str, str] = os.environ,
    platform: str = sys.platform,
    can_load: Callable[[str], bool] = loadable,
    x_answers: Callable[[], bool] = x_server_answers,
) -> str | None:
    """What stops Qt from showing a window here (one sentence), or None."""
    if platform == "win32" or platform == "darwin":
        return None
    qpa = (environ.get("QT_QPA_PLATFORM") or "").split(":")[0]
    offscreen = headless or qpa in ("offscreen", "minimal", "vnc")
    wanted = dict(BASE)
    on_x = not offscreen and (qpa == "xcb" or (not qpa and not environ.get("WAYLAND_DISPLAY")))
    if not offscreen and not qpa and not environ.get("DISPLAY") and not environ.get("WAYLAND_DISPLAY"):
        return f"no display (DISPLAY and WAYLAND_DISPLAY are not set); without a screen run `{HEADLESS_HINT}`"
    if on_x:
        wanted.update(XCB)
    missing = sorted({package for soname, package in wanted.items() if not can_load(soname)})
    if missing:
        kind = "the offscreen platform" if offscreen else "the window"
        return (f"system libraries missing for {kind}: {' '.join(missing)} "
                f"(Debian/Ubuntu: sudo apt install {' '.join(missing)})")
    if on_x and not x_answers():
        return (f"no X server answers on DISPLAY={environ.get('DISPLAY', '')}; "
                f"without a screen run `{HEADLESS_HINT}`")
    return None
