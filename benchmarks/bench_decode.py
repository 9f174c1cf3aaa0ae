"""Decode benchmark: wire-format lines per second through WireDecoder on one core.

A script that prints figures, not a test. Run: python benchmarks/bench_decode.py [--quick]
"""

from __future__ import annotations

import argparse
import random
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from drivers.mapping import MappedDecoder, parse_mapping  # noqa: E402
from drivers.wire import WireDecoder, encode_event, encode_header  # noqa: E402


def session_bytes(lines: int, seed: int = 1) -> bytes:
    """A plausible event mix: presses, releases, outcomes, rewards, licks, params."""
    rng = random.Random(seed)
    t = 4_000_000_000  # starts near the wrap so the unwrap path is exercised
    parts = [encode_header(fw="bench", start="2026-03-02T09:14:03+01:00")]
    kinds = [("lever_down",), ("lever_up",), ("lick",), ("trial_start",), ("outcome", "hit"), ("reward", 30),
             ("param", "window_low_ms", 520), ("joystick", 12.5, -3.0)]
    weights = [20, 20, 30, 8, 8, 6, 1, 7]
    for _ in range(lines):
        t = (t + rng.randint(1_000, 400_000)) % 2**32
        parts.append(encode_event(t, *rng.choices(kinds, weights)[0]))
    return b"".join(parts)


def rate(decoder_factory, data: bytes, chunk: int, repeats: int) -> tuple[float, int]:
    best = float("inf")
    count = 0
    for _ in range(repeats):
        decoder = decoder_factory()
        start = time.perf_counter()
        count = 0
        for i in range(0, len(data), chunk):
            count += len(decoder.feed(data[i : i + chunk]))
        best = min(best, time.perf_counter() - start)
    return count / best, count


MAPPING = """
[format]
delimiter = ";"
[columns]
device_time = 0
event = 1
value = 2
[clock]
unit = "us"
wrap_bits = 32
[events]
LP = "lever_down"
LR = "lever_up"
"""


def figures(quick: bool = False) -> list[tuple[str, float, str, str]]:
    """Table lines for `python -m benchmarks`: (label, value, unit, detail); best of 3 runs."""
    lines = 50_000 if quick else 500_000
    data = session_bytes(lines)
    mapped = b"".join(f"{i * 1000 % 2**32};{'LP' if i % 2 else 'LR'};1\n".encode() for i in range(lines))
    out = []
    for chunk, label in ((4096, "decode, 4 KiB reads"), (64, "decode, 64-byte reads (serial-sized)")):
        per_s, n = rate(WireDecoder, data, chunk, 3)
        out.append((label, per_s, "lines/s", f"{n:,} lines of a mixed session, best of 3"))
    per_s, n = rate(lambda: MappedDecoder(parse_mapping(MAPPING)), mapped, 4096, 3)
    out.append(("decode mapped format, 4 KiB reads", per_s, "lines/s", f"{n:,} lines, best of 3"))
    wire_limit = 16 * 115200 / 10 / 16  # 16 ports, 10 bits per byte, ~16-byte lines
    out.append(("wire limit, 16 ports at 115200 baud", wire_limit, "lines/s", "16-byte lines, 10 bits per byte"))
    return out


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--quick", action="store_true")
    args = parser.parse_args()
    print(f"{'figure':<44} {'value':>12}  unit")
    for label, value, unit, detail in figures(args.quick):
        print(f"{label:<44} {value:>12,.0f}  {unit} ({detail})")


if __name__ == "__main__":
    main()
