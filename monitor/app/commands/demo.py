"""`rigside demo`: simulated rigs through the real serial path (ptys or local sockets), the store and the window.

Rule: this module only parses and checks the options and the display (bad
values, no display or missing system libraries exit 2 with one line);
`monitor.app.window.demo.run` does the work and imports Qt itself.
"""

from __future__ import annotations

import argparse
from pathlib import Path

from monitor.app.errors import UsageError
from monitor.app.settings import add_settings_argument


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--speed", type=float, default=10.0,
                        help="simulated time runs this many times faster than the clock (default 10)")
    parser.add_argument("--seconds", type=float, help="stop after this many seconds (default: until closed)")
    parser.add_argument("--headless", action="store_true", help="no screen: the offscreen platform, 1366×768")
    parser.add_argument("--screenshot", type=Path, help="save the window as a PNG at the end")
    parser.add_argument("--db", type=Path, help="database file (default: a fresh one in the demo folder)")
    parser.add_argument("--folder", type=Path, help="where the demo's files go (default: a new temporary folder)")
    parser.add_argument("--seed", type=int, default=7, help="the simulated cohort's seed (default 7)")
    parser.add_argument("--animal", help="open this animal's page (alder, birch, cedar, damson)")
    parser.add_argument("--section", choices=("today", "curve", "consolidation", "sessions"), default="today",
                        help="the animal page's section to show (default today)")
    parser.add_argument("--files", action="store_true",
                        help="boxes write log files read by the file source")
    parser.add_argument("--sockets", action="store_true",
                        help="boxes listen on local TCP ports read through socket:// (what happens without ptys)")
    parser.add_argument("--no-fit", action="store_true", help="do not fit the consolidation model")
    parser.add_argument("--history", metavar="N,N,N,N",
                        help="sessions of generated history of alder, birch, cedar, damson (default 1,8,20,75)")
    add_settings_argument(parser)
    parser.add_argument("--wait-history", type=float, default=0.0, metavar="S",
                        help="before the screenshot, wait up to S seconds for the open page's history and fit")


def run(args: argparse.Namespace) -> int:
    if not args.speed > 0:
        raise UsageError(f"--speed: must be above 0, got {args.speed:g}")
    if args.seconds is not None and not args.seconds > 0:
        raise UsageError(f"--seconds: must be above 0, got {args.seconds:g}")
    if args.screenshot is not None and args.seconds is None:
        raise UsageError("--screenshot needs --seconds (the picture is taken at the end)")
    if args.headless and args.seconds is None:
        raise UsageError("--headless needs --seconds (there is no window to close)")
    if args.files and args.sockets:
        raise UsageError("--files and --sockets: choose one")
    if args.animal is not None and args.animal not in ("alder", "birch", "cedar", "damson"):
        raise UsageError(f"--animal: the demo animals are alder, birch, cedar and damson, not {args.animal!r}")
    history = None
    if args.history is not None:
        try:
            history = tuple(int(n) for n in args.history.split(","))
        except ValueError:
            history = ()
        if len(history) != 4 or min(history) < 1:
            raise UsageError(f"--history: four whole numbers of sessions, each at least 1, got {args.history!r}")
    from monitor.app.first_run import display_problem
    from monitor.app.settings import care_config, settings_path

    problem = display_problem(headless=args.headless)
    if problem:
        raise UsageError(problem)

    try:
        care = care_config(settings_path(args.settings))
    except ValueError as exc:
        raise UsageError(f"--settings: {exc}") from None
    from monitor.app.window.demo import DemoOptions
    from monitor.app.window.demo import run as run_demo

    return run_demo(DemoOptions(speed=args.speed, seconds=args.seconds, headless=args.headless,
                                screenshot=args.screenshot, db=args.db, folder=args.folder, seed=args.seed,
                                animal=args.animal, section=args.section, files=args.files, sockets=args.sockets,
                                fit=not args.no_fit,
                                wait_history=args.wait_history, history=history, care=care))
