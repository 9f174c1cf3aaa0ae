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


def figures(times_s: list[float]) -> str:
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


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--ticks", type=int, default=200)
    args = parser.parse_args()
    app = QApplication.instance() or QApplication([])
    board, book, alerts = RigBoard(), AnimalBook(), AlertBook()
    rng = np.random.default_rng(0)
    for i in range(16):
        board.update(sample.tile_state(i, rng))
    book.update(sample.animal_page_state("cedar"))
    window = MainWindow(board, book, alerts, beep=lambda: None)
    window.show()
    app.processEvents()

    # 16 tiles, every one changed on every refresh
    ticks = [[replace(sample.tile_state(i, rng, seconds=600 + t), trials_today=100 + t) for i in range(16)]
             for t in range(args.ticks)]
    painted = sum(tile.paint_count for tile in window.overview.tiles())
    times = timed(lambda states: [board.update(s) for s in states], ticks)
    painted = sum(tile.paint_count for tile in window.overview.tiles()) - painted
    print(f"overview, 16 tiles changed per refresh ({args.ticks} refreshes, {painted} tile paints): {figures(times)}")

    # the animal page, Today section visible: one more trial per refresh
    window.open_animal("cedar")
    app.processEvents()
    base = book.state("cedar")
    todays = [replace(base, today=sample.today_state(np.random.default_rng(t), trials=300 + t))
              for t in range(args.ticks)]
    print(f"animal page, live part (histograms + rolling rate, 300+ trials): {figures(timed(book.update, todays))}")

    # the animal page, a session ended: learning curve, consolidation and table replaced
    page = window.pages["cedar"]
    ends = []
    for t in range(max(20, args.ticks // 5)):
        r = np.random.default_rng(1000 + t)
        curve = sample.curve_state(r, sessions=24 + t % 5)
        ends.append(replace(base, curve=curve, consolidation=sample.consolidation_state(r, last=24 + t % 5),
                            sessions=sample.session_rows(r, curve)))
    for index, name in ((1, "learning curve"), (2, "consolidation"), (3, "sessions")):
        page.sections.setCurrentIndex(index)
        app.processEvents()
        print(f"animal page, session ended, {name} section visible: {figures(timed(book.update, ends))}")
    window.close()


if __name__ == "__main__":
    main()
