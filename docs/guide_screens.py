"""Make the user guide's pictures (docs/screens/guide-*.png) from the headless demo, in one command.

Rule: every picture comes from one run of `rigside demo --headless` (the real
serial path, store, engine and window on the offscreen platform), never from
hand-made states: the run imports the demo cohort's history, fits the
consolidation model, checks the four demo animals in and lets them train for
`--seconds`; then, before anything stops, it opens each screen the guide
shows and saves `grab()` of it at 1366x768 (guide-NAME.png) and again at
1920x1080 (guide-NAME-1920.png). A screen that does not appear in time is
reported and the command exits 1, so a stale picture is never kept silently.

Run after the README's install:  python docs/guide_screens.py [--seconds 40] [--out docs/screens]
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
from pathlib import Path
from typing import Callable

HERE = Path(__file__).resolve().parent
ANIMAL = "cedar"  # the demo's "plateaued, not consolidated" animal (mock_rig/demo.py)
SIZES = ((1366, 768, ""), (1920, 1080, "-1920"))   # the smallest laptop screen, then a common desktop one


def shoot(out: Path, missing: list[str]) -> Callable:
    """The demo's inspect callback: open each screen, wait for it, save it."""

    def run(controller, window) -> None:
        from PySide6.QtWidgets import QApplication

        from monitor.app.window.demo import wait_for

        app = QApplication.instance()
        for width, height, suffix in SIZES:
            window.resize(width, height)
            app.processEvents()
            shoot_all(controller, window, app, wait_for, suffix, (width, height))

    def shoot_all(controller, window, app, wait_for, suffix: str, size: tuple[int, int]) -> None:
        from PySide6.QtWidgets import QWidget

        from monitor.app.window.demo import SECTIONS

        def save(widget: QWidget, name: str) -> None:
            app.processEvents()
            path = out / f"guide-{name}{suffix}.png"
            widget.grab().save(str(path))
            print(f"guide_screens: {path}", file=sys.stderr)

        def dialog(opener: Callable[[], object], owner, name: str, timeout: float = 30.0) -> None:
            before = getattr(owner, "dialog", None)
            opener()
            if not wait_for(lambda: getattr(owner, "dialog", None) not in (None, before)
                            and owner.dialog.isVisible(), timeout, app):
                missing.append(name)
                return
            save(owner.dialog, name)
            owner.dialog.close()

        window.tabs.setCurrentIndex(0)
        save(window, "overview")
        dialog(window.open_setup, window, "add-rig")
        dialog(window.open_check_in, window, "check-in")
        dialog(window.open_give, window, "give")
        page = window.open_animal(ANIMAL)
        history = wait_for(lambda: ANIMAL in controller.history_parts and ANIMAL in controller.fits, 300, app)
        if not history:
            missing.append("history and fit of " + ANIMAL)
        for section in SECTIONS:
            page.sections.setCurrentIndex(SECTIONS[section])
            save(window, f"animal-{section}")
        records = controller.decisions_and_care
        dialog(lambda: records.open_decision(ANIMAL), records, "decision")
        dialog(lambda: records.open_history(ANIMAL), records, "decision-history")
        records.open_care()
        if wait_for(lambda: records.care_panel is not None and records.care_panel.isVisible(), 30, app):
            wait_for(lambda: False, 2.0, app)  # the care day is read in a worker
            save(records.care_panel, "care")
            records.care_panel.close()
        else:
            missing.append("care")
        records.open_cohort()
        if wait_for(lambda: records.cohort is not None and records.cohort.isVisible(), 30, app):
            wait_for(lambda: False, 2.0, app)  # the figures are read in a worker
            records.cohort.resize(min(size[0], 1500), min(size[1], 640))
            save(records.cohort, "cohort")
            records.cohort.close()
        else:
            missing.append("cohort")
        window.close_current_page()
        window.tabs.setCurrentIndex(0)

    return run


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seconds", type=float, default=40.0, help="live training before the pictures (default 40)")
    parser.add_argument("--speed", type=float, default=20.0, help="simulated time per real second (default 20)")
    parser.add_argument("--out", type=Path, default=HERE / "screens", help="folder for the PNGs (default docs/screens)")
    args = parser.parse_args(argv)
    os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")
    from monitor.app.window.demo import DemoOptions, run

    args.out.mkdir(parents=True, exist_ok=True)
    missing: list[str] = []
    with tempfile.TemporaryDirectory(prefix="rigside-guide-") as folder:
        code = run(DemoOptions(speed=args.speed, seconds=args.seconds, headless=True, folder=Path(folder)),
                   inspect=shoot(args.out, missing))
    if missing:
        print(f"guide_screens: did not appear in time: {', '.join(missing)}", file=sys.stderr)
        return 1
    return code


if __name__ == "__main__":
    sys.exit(main())
