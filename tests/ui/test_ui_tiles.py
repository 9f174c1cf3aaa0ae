"""Overview tiles and the RigBoard: model→UI and UI→model, separately."""

from __future__ import annotations

from dataclasses import replace

import numpy as np
from PySide6.QtCore import QPoint, Qt
from PySide6.QtGui import QColor

from monitor.ui import sample
from monitor.ui.models import Connection, RigTileState, Severity
from monitor.ui.overview import OverviewPanel
from monitor.ui.owners import RigBoard
from monitor.ui.theme import OKABE_ITO
from monitor.ui.tile import RigTile


def board_with(n: int) -> RigBoard:
    board = RigBoard()
    rng = np.random.default_rng(1)
    for i in range(n):
        board.update(sample.tile_state(i, rng))
    return board


def colours_in(widget) -> set[str]:
    image = widget.grab().toImage()
    return {QColor(image.pixel(x, y)).name().upper()
            for x in range(0, image.width(), 2) for y in range(0, image.height(), 2)}


# --- the board (model) ---------------------------------------------------------
def test_board_announces_new_changed_and_removed_rigs(qtbot):
    board = RigBoard()
    state = RigTileState("box-01", "alder", Connection.LIVE, trials_today=3)
    with qtbot.waitSignal(board.rig_added) as added:
        assert board.update(state)
    assert added.args == ["box-01"]
    with qtbot.assertNotEmitted(board.rig_changed):
        assert not board.update(replace(state))          # equal state: nothing to redraw
    with qtbot.waitSignal(board.rig_changed) as changed:
        assert board.update(replace(state, trials_today=4))
    assert changed.args == ["box-01"]
    with qtbot.waitSignal(board.rig_removed):
        board.remove("box-01")
    assert board.rigs() == []


# --- model -> UI ---------------------------------------------------------------
def test_overview_builds_a_square_grid_of_tiles(qtbot):
    panel = OverviewPanel(board_with(16))
    qtbot.addWidget(panel)
    assert [t.state.rig for t in panel.tiles()] == [f"box-{i:02d}" for i in range(1, 17)]
    grid = panel._grid
    positions = {grid.getItemPosition(grid.indexOf(t))[:2] for t in panel.tiles()}
    assert positions == {(r, c) for r in range(4) for c in range(4)}


def test_a_changed_rig_repaints_only_its_own_tile(qtbot):
    board = board_with(4)
    panel = OverviewPanel(board)
    qtbot.addWidget(panel)
    panel.resize(800, 500)
    panel.show()
    qtbot.waitExposed(panel)
    tiles = {t.state.rig: t for t in panel.tiles()}
    qtbot.waitUntil(lambda: all(t.paint_count > 0 for t in tiles.values()))
    before = {rig: t.paint_count for rig, t in tiles.items()}
    board.update(replace(board.state("box-02"), trials_today=999))
    qtbot.waitUntil(lambda: tiles["box-02"].paint_count > before["box-02"])
    assert tiles["box-02"].texts.trials == "999"
    assert all(tiles[r].paint_count == before[r] for r in ("box-01", "box-03", "box-04"))


def test_tile_draws_state_in_okabe_ito_colour_and_badge(qtbot):
    state = RigTileState("box-16", "plover", Connection.LOST, session_seconds=10, trials_today=5,
                         hist_counts=(1, 3, 2), hist_edges_ms=(0.0, 500.0, 1000.0, 1500.0),
                         window_low_ms=520, window_high_ms=780, last_interval_ms=600,
                         alert_count=2, alert_severity=Severity.URGENT)
    tile = RigTile(state)
    qtbot.addWidget(tile)
    tile.resize(300, 180)
    seen = colours_in(tile)
    assert OKABE_ITO["vermillion"] in seen        # the "lost" cross and the urgent badge
    assert OKABE_ITO["blue"] in seen              # histogram bars
    assert OKABE_ITO["orange"] in seen            # the last interval's marker
    assert tile.texts.state == "lost" and tile.texts.badge == "2"
    assert "lost" in tile.accessibleDescription()


def test_tile_shows_no_histogram_when_there_are_no_intervals(qtbot):
    tile = RigTile(RigTileState("box-12", None, Connection.IDLE))
    qtbot.addWidget(tile)
    tile.resize(300, 180)
    seen = colours_in(tile)
    assert OKABE_ITO["blue"] not in seen and OKABE_ITO["sky_blue"] in seen   # the idle ring


def test_closed_overview_stops_listening(qtbot):
    board = board_with(2)
    panel = OverviewPanel(board)
    qtbot.addWidget(panel)
    panel.close()
    board.update(replace(board.state("box-01"), trials_today=12345))
    assert panel.tile("box-01").texts.trials != "12345"


def test_new_and_removed_rigs_change_the_grid(qtbot):
    board = board_with(3)
    panel = OverviewPanel(board)
    qtbot.addWidget(panel)
    board.update(RigTileState("box-99", "zed", Connection.IDLE))
    assert panel.tile("box-99") is not None and len(panel.tiles()) == 4
    board.remove("box-01")
    assert panel.tile("box-01") is None and len(panel.tiles()) == 3


# --- UI -> model ---------------------------------------------------------------
def test_click_and_enter_on_a_tile_ask_to_open_its_rig(qtbot):
    panel = OverviewPanel(board_with(4))
    qtbot.addWidget(panel)
    panel.resize(800, 500)
    panel.show()
    qtbot.waitExposed(panel)
    tile = panel.tile("box-03")
    with qtbot.waitSignal(panel.open_requested) as opened:
        qtbot.mouseClick(tile, Qt.MouseButton.LeftButton, pos=QPoint(20, 20))
    assert opened.args == ["box-03"]
    panel.focus_rig("box-02")
    with qtbot.waitSignal(panel.open_requested) as opened:
        qtbot.keyClick(panel.tile("box-02"), Qt.Key.Key_Return)
    assert opened.args == ["box-02"]


def test_arrow_keys_and_next_move_between_tiles(qtbot):
    panel = OverviewPanel(board_with(4))     # 2 x 2
    qtbot.addWidget(panel)
    panel.show()
    qtbot.waitExposed(panel)
    panel.focus_rig("box-01")
    qtbot.keyClick(panel.tile("box-01"), Qt.Key.Key_Down)
    assert panel.current_rig() == "box-03"
    qtbot.keyClick(panel.tile("box-03"), Qt.Key.Key_Right)
    assert panel.current_rig() == "box-04"
    assert panel.focus_next(1) == "box-01"     # wraps round
    assert panel.focus_next(-1) == "box-04"


def test_tile_tooltip_shows_a_device_path_literally(qtbot):
    from PySide6.QtGui import QTextDocument

    tile = RigTile(RigTileState("box-01", None, Connection.IDLE, source_text="<b>/dev/ttyACM0</b> & co"))
    qtbot.addWidget(tile)
    rendered = QTextDocument()
    rendered.setHtml(tile.toolTip())            # what Qt shows for a rich-text tooltip
    assert rendered.toPlainText() == "<b>/dev/ttyACM0</b> & co"


def test_owners_refuse_changes_from_a_worker_thread(qtbot):
    import threading

    board = RigBoard()
    errors = []

    def worker() -> None:
        try:
            board.update(RigTileState("box-01", None, Connection.IDLE))
        except RuntimeError as error:
            errors.append(str(error))

    thread = threading.Thread(target=worker)
    thread.start()
    thread.join()
    assert errors == ["RigBoard is changed from the GUI thread only"] and board.rigs() == []


def test_repainting_tiles_does_not_drop_nones_refcount(qtbot):
    # guards the PySide6 pin from the UI side (STACK-NOTES.md: 6.12.0 loses a None reference per void call)
    import sys

    tile = RigTile(sample.tile_state(0, np.random.default_rng(0)))
    qtbot.addWidget(tile)
    tile.resize(300, 180)
    tile.grab()
    before = sys.getrefcount(None)
    for i in range(200):
        tile.set_state(replace(tile.state, trials_today=i + 1000))
        tile.grab()                                   # a full paint: dozens of void QPainter calls
    # 6.12.0 would drop thousands here (200 paints x dozens of void calls); other threads of
    # earlier tests still ending can move None's count by a few dozen, so allow 200.
    assert sys.getrefcount(None) >= before - 200


# --- drawing: a cached static layer under the figures ------------------------------
def test_histogram_bars_are_fractions_of_the_plot():
    from monitor.ui.tile_paint import histogram_bars

    # bins [0, 1), [1, 2), [2, 4] over a 4 ms axis; the empty bin draws nothing, the tallest fills the plot
    assert histogram_bars((0, 2, 4), (0.0, 1.0, 2.0, 4.0)) == ((0.25, 0.25, 0.5), (0.5, 0.5, 1.0))
    assert histogram_bars((), ()) == ()


def test_a_text_slot_puts_text_where_qts_own_aligned_drawtext_does(qtbot):
    # the reference is Qt's drawText(rect, AlignRight | AlignVCenter): the slot must draw the same pixels
    from PySide6.QtCore import QRectF
    from PySide6.QtGui import QFont, QImage, QPainter

    from monitor.ui.tile_paint import RIGHT, LEFT, draw_in, text_slot

    font = QFont()
    font.setPixelSize(23)
    rect = QRectF(10.5, 7.25, 180.0, 31.0)

    def drawn(paint) -> QImage:
        image = QImage(220, 50, QImage.Format.Format_ARGB32_Premultiplied)
        image.fill(0)
        p = QPainter(image)
        paint(p)
        p.end()
        return image

    for align, right in ((RIGHT, True), (LEFT, False)):
        def by_qt(p):
            p.setFont(font)
            p.drawText(rect, align, "hit 62 %")
        assert drawn(by_qt) == drawn(lambda p: draw_in(p, text_slot(rect, font, right), "hit 62 %"))


def test_the_static_layer_is_kept_while_only_figures_change(qtbot):
    tile = RigTile(sample.tile_state(0, np.random.default_rng(0)))
    qtbot.addWidget(tile)
    tile.resize(300, 180)
    first = tile.grab().toImage()
    builds = tile.static_builds
    tile.set_state(replace(tile.state, trials_today=tile.state.trials_today + 1, session_seconds=4000.0))
    changed = tile.grab().toImage()
    assert tile.static_builds == builds and changed != first        # figures redrawn over the kept layer
    tile.set_state(replace(tile.state, connection=Connection.QUIET))
    tile.grab()
    assert tile.static_builds == builds + 1                          # the frame and state word changed


def test_a_tile_shows_the_same_pixels_for_the_same_state_whatever_came_between(qtbot):
    state = sample.tile_state(3, np.random.default_rng(2))
    tile = RigTile(state)
    qtbot.addWidget(tile)
    tile.resize(300, 180)
    before = tile.grab().toImage()
    tile.set_state(replace(state, trials_today=99999, hit_rate=0.99, last_interval_ms=1400.0,
                           hist_counts=tuple(reversed(state.hist_counts))))
    tile.grab()
    tile.set_state(state)
    assert tile.grab().toImage() == before                           # nothing stale left by the dynamic layer
