"""`python -m mock_rig`: simulated boxes and animals from the command line.

Rule: each subcommand is a thin wrapper over the module API (history, live,
demo); bad arguments print a one-line error naming the argument and exit 2
(argparse's convention); Ctrl-C stops live boxes cleanly with exit 0.
`history` shows a progress bar of sessions on a terminal (not with `--quiet`)
and ends with a summary line; Ctrl-C stops it with exit 130, naming the
sessions written (each file whole; the truth file is written last). Nothing
here needs a POSIX-only module: a pty is asked for only with `--out pty`
(the default where the platform has ptys, else `socket`).
"""

from __future__ import annotations

import argparse
import os
import sys
import time
from pathlib import Path

from mock_rig import scenario
from mock_rig.faults import KINDS, parse_fault
from mock_rig.history import cohort, write_history
from mock_rig.live import LiveRig, stop_rigs
from mock_rig.outputs import FileOutput, PtyOutput, SocketOutput, StreamOutput, pty_available
from mock_rig.rig import BoardConfig, wrap_soon
from mock_rig.tasks import JOYSTICK_HOLD, TWO_PRESS


def _positive(kind):
    def convert(text: str):
        value = kind(text)
        if value <= 0:
            raise argparse.ArgumentTypeError(f"must be positive, got {text}")
        return value

    return convert


def _fault(text: str):
    try:
        return parse_fault(text)
    except ValueError as exc:
        raise argparse.ArgumentTypeError(str(exc)) from None


def _variants(parser: argparse.ArgumentParser) -> None:
    group = parser.add_argument_group("variants (animal and firmware)")
    group.add_argument("--drive", choices=("error", "outcome"), default="error",
                       help="fast learning from the signed error or from the reward (default error)")
    group.add_argument("--warmup", action="store_true", help="session-start warm-up offset")
    group.add_argument("--satiety", action="store_true", help="late-session satiety drift")
    group.add_argument("--narrowing", action="store_true",
                       help="variability narrows with practice")
    group.add_argument("--legacy", action="store_true",
                       help="older firmware: no outcome and no param events")


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="python -m mock_rig",
        description="Simulated animals and operant boxes that speak rigside wire format 1.",
    )
    sub = parser.add_subparsers(dest="command", required=True)

    hist = sub.add_parser("history", help="write weeks of session files, protocols and truth.json")
    hist.add_argument("--animals", type=_positive(int), default=8)
    hist.add_argument("--days", type=_positive(int), default=30, help="calendar days (weekday sessions)")
    hist.add_argument("--seed", type=int, default=1)
    hist.add_argument("--out", type=Path, required=True, help="directory to write into")
    hist.add_argument("--task", choices=(TWO_PRESS, JOYSTICK_HOLD), default=TWO_PRESS)
    hist.add_argument("--manipulate", type=_plan, action="append", default=[], metavar="ANIMAL:SESSION:KIND",
                      help="a simulated manipulation (kinds: inactivate_fast, vehicle, lesion_fast, sham); repeatable")
    hist.add_argument("--quiet", action="store_true", help="no progress bar")
    hist.add_argument("--trial-truth", action="store_true",
                      help="also write NAME.trials.csv: latent states per completed trial")
    _variants(hist)

    live = sub.add_parser("live", help="run one simulated box in real time or faster")
    live.add_argument("--out", default=None,
                      help="pty | socket[:PORT] | stdout | file:PATH (default pty, or socket where there are no ptys)")
    live.add_argument("--link", type=Path, help="pty only: keep this symlink pointing at the device")
    live.add_argument("--no-wait", action="store_true",
                      help="pty or socket: start at once instead of booting when a reader opens the port")
    live.add_argument("--speed", type=_positive(float), default=1.0, help="times faster than real time")
    live.add_argument("--seed", type=int, default=1)
    live.add_argument("--animal", type=int, default=0, help="index of the cohort animal (default 0)")
    live.add_argument("--task", choices=(TWO_PRESS, JOYSTICK_HOLD), default=TWO_PRESS)
    live.add_argument("--sessions", type=int, default=1, help="sessions to run (0 = until stopped)")
    live.add_argument("--seconds", type=_positive(float), help="stop after this many seconds")
    live.add_argument("--wrap", type=int, default=32, help="counter bits (0 = never wraps)")
    live.add_argument("--wrap-soon", type=_positive(float), metavar="SECONDS",
                      help="start the counter so that it wraps this many seconds after boot")
    live.add_argument("--fault", type=_fault, action="append", default=[],
                      metavar="KIND@START[:SECONDS]", help=f"schedule a fault; kinds: {', '.join(KINDS)}")
    _variants(live)

    demo = sub.add_parser("demo", help="four demo animals with history, live on ptys (sockets where there are none)")
    demo.add_argument("--out", type=Path, required=True, help="directory for the history files")
    demo.add_argument("--links", type=Path, help="directory for per-animal device symlinks")
    demo.add_argument("--speed", type=_positive(float), default=10.0)
    demo.add_argument("--seconds", type=_positive(float), help="stop after this many seconds")
    demo.add_argument("--seed", type=int, default=7)
    demo.add_argument("--via", choices=("auto", "pty", "socket"), default="auto",
                      help="pty, socket (socket://127.0.0.1:PORT) or auto: a pty where there are ptys (default)")
    return parser


def _base(args):
    return scenario.variant_params(args.drive, args.warmup, args.satiety, args.narrowing)


def _plan(text: str):
    from mock_rig.manipulations import parse_plan

    try:
        return parse_plan(text)
    except ValueError as exc:
        raise argparse.ArgumentTypeError(str(exc)) from None


def cmd_history(args) -> int:
    started = time.perf_counter()
    animals = cohort(args.animals, args.seed, _base(args), legacy=args.legacy, task=args.task)
    total = len(animals) * len(scenario.session_days(scenario.FIRST_DAY, args.days))
    done: list[str] = []
    bar = None
    if not args.quiet and sys.stderr.isatty():
        from tqdm import tqdm

        try:
            sized = min(os.get_terminal_size(sys.stderr.fileno())) > 0
        except (AttributeError, OSError, ValueError):
            sized = False   # a terminal that states no size (0 x 0) gets 80 x 24: tqdm draws nothing on 0 rows
        bar = tqdm(total=total, unit="session", desc="writing history", file=sys.stderr, mininterval=0.1,
                   dynamic_ncols=sized, ncols=None if sized else 80, nrows=None if sized else 24, leave=False)

    def written(name: str) -> None:
        done.append(name)
        if bar is not None:
            bar.update(1)
    try:
        if args.manipulate:
            from mock_rig import manipulations

            plans: dict[str, dict[int, str]] = {}
            for animal, session, kind in args.manipulate:
                plans.setdefault(animal, {})[session] = kind
            truth = manipulations.write_history(args.out, animals, args.days, plans, written)
        else:
            truth = write_history(args.out, animals, args.days, trial_truth=args.trial_truth, written=written)
    except KeyboardInterrupt:
        if bar is not None:
            bar.close()
        last = f" (the last: {done[-1]})" if done else ""
        print(f"interrupted: wrote {len(done)} of {total} session files to {args.out}{last}, each whole; "
              "no truth.json: run the command again for the whole history", file=sys.stderr)
        return 130
    if bar is not None:
        bar.close()
    sessions = sum(len(a["sessions"]) for a in truth["animals"].values())
    print(f"wrote {sessions} sessions of {len(animals)} animals to {args.out} "
          f"in {time.perf_counter() - started:.1f} s")
    return 0


def _output(args, parser):
    out = args.out or ("pty" if pty_available() else "socket")
    if out == "pty":
        if not pty_available():
            parser.error("argument --out: this platform has no pseudo-terminals; use socket[:PORT]")
        return PtyOutput(link=args.link, wait_for_open=not args.no_wait)
    if out == "socket" or out.startswith("socket:"):
        port = out[7:] or "0"
        if not port.isdigit() or int(port) > 65535:
            parser.error(f"argument --out: expected socket:PORT with PORT 0-65535, got {out!r}")
        try:
            return SocketOutput(int(port), wait_for_open=not args.no_wait)
        except OSError as exc:
            parser.error(f"argument --out: cannot listen on 127.0.0.1:{port}: {exc.strerror or exc}")
    if out == "stdout":
        return StreamOutput()
    if out.startswith("file:") and len(out) > 5:
        return FileOutput(out[5:])
    parser.error(f"argument --out: expected pty, socket[:PORT], stdout or file:PATH, got {out!r}")


def cmd_live(args, parser) -> int:
    if args.animal < 0:
        parser.error("argument --animal: must be 0 or more")
    animal = cohort(args.animal + 1, args.seed, _base(args), legacy=args.legacy, task=args.task)[args.animal]
    start = wrap_soon(args.wrap_soon, args.wrap) if args.wrap_soon and args.wrap else None
    animal.board = BoardConfig(fw=animal.board.fw, wrap=args.wrap, legacy=args.legacy,
                               counter_start_us=start, rig_name=animal.board.rig_name)
    output = _output(args, parser)
    if isinstance(output, (PtyOutput, SocketOutput)):
        where = f" (symlink {args.link})" if args.link and isinstance(output, PtyOutput) else ""
        print(f"{animal.name}: device {output.device}{where}", file=sys.stderr, flush=True)
    rig = LiveRig(animal, output, speed=args.speed, faults=tuple(args.fault),
                  sessions=args.sessions or None)
    return _run_until(args.seconds, [rig.start()])


def cmd_demo(args) -> int:
    from mock_rig.demo import prepare_demo, start_demo

    if args.via == "pty" and not pty_available():
        print("python -m mock_rig demo: error: argument --via: this platform has no pseudo-terminals; "
              "use socket", file=sys.stderr)
        return 2
    prepared = prepare_demo(args.out, args.seed)
    rigs = start_demo(prepared, args.links, args.speed, via=args.via)
    for d, rig in zip(prepared, rigs):
        print(f"{d.animal.name} ({d.label}): {rig.output.device} protocol {d.protocol_path}",
              flush=True)
    return _run_until(args.seconds, rigs)


def _run_until(seconds: float | None, rigs: list[LiveRig]) -> int:
    deadline = None if seconds is None else time.monotonic() + seconds
    try:
        while any(r.running for r in rigs):
            if deadline is not None and time.monotonic() >= deadline:
                break
            time.sleep(0.1)
    except KeyboardInterrupt:
        pass
    stop_rigs(rigs)
    errors = [r.error for r in rigs if r.error is not None]
    for error in errors:
        print(f"mock_rig: box stopped with an error: {error!r}", file=sys.stderr)
    return 1 if errors else 0


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if args.command == "history":
        return cmd_history(args)
    if args.command == "live":
        return cmd_live(args, parser)
    return cmd_demo(args)


if __name__ == "__main__":
    sys.exit(main())
