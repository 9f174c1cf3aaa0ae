"""GUI main-thread time per refresh, paint included (offscreen, software rendering).

Rule: states are made before timing (that is the app's and engine's work);
one refresh = pushing the new states into the owners and letting Qt paint
(`processEvents`), as the app's ~20 Hz timer will. Prints p50 / p95 / max in ms
for: 16 overview tiles all changed every refresh (goal <= 30 ms), the animal
page's live part (a new trial), and its history part (a session ended).

Run: QT_QPA_PLATFORM=offscreen python benchmarks/bench_gui.py [--ticks N]
"""

from __future__ import annotations

import argparse
import os
import time
from dataclasses import replace

import numpy as np

os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")

from PySide6.QtWidgets import QApplication  # noqa: E402

from monitor.ui import sample  # noqa: E402
from monitor.ui.main_window import MainWindow  # noqa: E402
from monitor.ui.owners import AlertBook, AnimalBook, RigBoard  # noqa: E402


def summary(times_s: list[float]) -> str:
    ms = np.array(times_s) * 1000
    return f"p50 {np.percentile(ms, 50):6.2f} ms   p95 {np.percentile(ms, 95):6.2f} ms   max {ms.max():6.2f} ms"


def timed(push, states) -> list[float]:
    times = []
    for state in states:
        t0 = time.perf_counter()
        push(state)
        QApplication.processEvents()
        times.append(time.perf_counter() - t0)
    return times


def percentiles_ms(times_s: list[float]) -> tuple[float, float, float]:
    ms = np.array(times_s) * 1000
    return float(np.percentile(ms, 50)), float(np.percentile(ms, 95)), float(ms.max())


def measure(ticks: int, report=print) -> dict[str, list[float]]:
    """Seconds per refresh for each case; `report(line)` gets the printed figures as they come."""
    app = QApplication.instance() or QApplication([])
    board, book, alerts = RigBoard(), AnimalBook(), AlertBook()
    rng = np.random.default_rng(0)
    for i in range(16):
        board.update(sample.tile_state(i, rng))
    book.update(sample.animal_page_state("cedar"))
    window = MainWindow(board, book, alerts, beep=lambda: None)
    window.show()
    app.processEvents()
    results: dict[str, list[float]] = {}

    # 16 tiles, every one changed on every refresh
    states = [[replace(sample.tile_state(i, rng, seconds=600 + t), trials_today=100 + t) for i in range(16)]
              for t in range(ticks)]
    painted = sum(tile.paint_count for tile in window.overview.tiles())
    times = timed(lambda batch: [board.update(s) for s in batch], states)
    painted = sum(tile.paint_count for tile in window.overview.tiles()) - painted
    results["overview"] = times
    report(f"overview, 16 tiles changed per refresh ({ticks} refreshes, {painted} tile paints): {summary(times)}")

    # the animal page, Today section visible: one more trial per refresh
    window.open_animal("cedar")
    app.processEvents()
    base = book.state("cedar")
    todays = [replace(base, today=sample.today_state(np.random.default_rng(t), trials=300 + t))
              for t in range(ticks)]
    results["live"] = timed(book.update, todays)
    report(f"animal page, live part (histograms + rolling rate, 300+ trials): {summary(results['live'])}")

    # the animal page, a session ended: learning curve, consolidation and table replaced
    page = window.pages["cedar"]
    ends = []
    for t in range(max(20, ticks // 5)):
        r = np.random.default_rng(1000 + t)
        curve = sample.curve_state(r, sessions=24 + t % 5)
        ends.append(replace(base, curve=curve, consolidation=sample.consolidation_state(r, last=24 + t % 5),
                            sessions=sample.session_rows(r, curve)))
    for index, name in ((1, "learning curve"), (2, "consolidation"), (3, "sessions")):
        page.sections.setCurrentIndex(index)
        app.processEvents()
        results[name] = timed(book.update, ends)
        report(f"animal page, session ended, {name} section visible: {summary(results[name])}")
    window.close()
    return results


def figures(quick: bool = False) -> list[tuple[str, float, str, str]]:
    """Table lines for `python -m benchmarks`: (label, value, unit, detail)."""
    ticks = 60 if quick else 200
    results = measure(ticks, report=lambda line: None)
    p50, p95, top = percentiles_ms(results["overview"])
    live50, live95, _ = percentiles_ms(results["live"])
    return [
        ("GUI main thread per refresh, 16 tiles changed (p95)", p95, "ms",
         f"goal <= 30 ms ({'met' if p95 <= 30 else 'NOT met'}); p50 {p50:.1f} ms, max {top:.1f} ms over {ticks} "
         f"refreshes, paint included (offscreen, software rendering)"),
        ("GUI main thread per refresh, animal page live part (p95)", live95, "ms",
         f"p50 {live50:.1f} ms; histograms + rolling rate, 300+ trials"),
    ]


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--ticks", type=int, default=200)
    args = parser.parse_args()
    measure(args.ticks)


if __name__ == "__main__":
    main()
