"""The preview in a terminal with a picture protocol, driven headless with Pilot.

Headless apps never choose a protocol (the first test); the others hand the preview an
environment and ``headless=False`` explicitly, to see the lines it would send. The
headless driver writes nothing anywhere, so no escape sequence leaves the test.
Expected bytes come from the encoders, whose own tests check them against the kitty
protocol document and the DEC sixel chapter (tests/tui/test_graphics.py).
"""

from rich.console import Console

from labeler.tui.app import QueueApp
from labeler.tui.graphics import fit_cells, resize_nearest
from labeler.tui.graphics_kitty import placeholder_cell
from labeler.tui.graphics_sixel import median_cut, sixel_encode
from labeler.tui.preview import HALF_BLOCK, box_downsample
from labeler.tui.widgets import PREVIEW_IMAGE_ID, TilePreview
from labeler.workflow import pick_tiles
from tests.tui.helpers import SIZE, idle
from tests.workflow.conftest import fake_proposals

KITTY = {"TERM": "xterm-kitty", "COLORTERM": "truecolor"}


def _screen_text(app) -> str:
    """What a full repaint of the screen writes to a 24-bit colour terminal."""
    update = app.screen._compositor.render_update(full=True)
    return update.render_segments(Console(color_system="truecolor", force_terminal=True))


async def test_headless_queue_draws_half_blocks_even_in_a_kitty_environment(project):
    fake_proposals(project)
    app = QueueApp(project, annotator="ana", environ=KITTY)
    async with app.run_test(size=SIZE) as pilot:
        await idle(pilot)
        preview = app.screen.query_one(TilePreview)
        assert preview.graphics == "off" and not preview.drawing_graphics
        assert app.screen.query_one("#side").border_title == "half blocks (headless)"
        assert HALF_BLOCK in preview.render().plain
        written = _screen_text(app)
        assert "\x1b_G" not in written and "\x1bP" not in written
        assert "\U0010eeee" not in written


async def test_kitty_terminal_gets_the_tile_at_full_resolution(project):
    fake_proposals(project)
    pick_tiles(project, seed=0)
    app = QueueApp(project, annotator="ana", environ=KITTY)
    async with app.run_test(size=SIZE) as pilot:
        await idle(pilot)
        preview = app.screen.query_one(TilePreview)
        note = preview.pick_graphics("auto", KITTY, headless=False, truecolor=True)
        assert note == "kitty graphics, full resolution" and preview.graphics == "kitty"
        await idle(pilot)
        size = preview.content_size
        h, w = preview._rgb.shape[:2]
        down, across = fit_cells((h, w), cols=size.width, rows=size.height, cell_px=(10, 20))
        first = preview.render_line(0)
        texts = [s.text for s in first]
        assert texts[:across] == [placeholder_cell(0, x) for x in range(across)]
        # the picture goes at its own resolution (the whole tile, every pixel)
        escape = texts[-1]
        assert escape.startswith(f"\x1b_Ga=T,U=1,f=24,s={w},v={h},i={PREVIEW_IMAGE_ID},"
                                 f"c={across},r={down},q=2,o=z")
        written = _screen_text(app)
        assert escape in written  # the compositor writes it whole
        assert "\x1b[38;2;76;97;98m" + placeholder_cell(0, 0) in written  # id 0x4C6162
        assert placeholder_cell(down - 1, across - 1) in written
        # zoom and clicks work on the picture as on the half blocks
        await pilot.press("plus")
        await idle(pilot)
        r0, r1, c0, c1 = preview.shown_window
        ph, pw = r1 - r0, c1 - c0
        assert preview.zoom == 2 and (ph, pw) != (h, w)
        # the part shown, each tile pixel repeated k times (sharp, no smoothing) so it
        # holds at least the cells' pixels
        down, across = fit_cells((ph, pw), cols=size.width, rows=size.height, cell_px=(10, 20))
        k = max(1, min(down * 20 // ph, across * 10 // pw))
        escape = list(preview.render_line(0))[-1].text
        assert escape.startswith(f"\x1b_Ga=T,U=1,f=24,s={pw * k},v={ph * k},")
        # under a dialog the preview goes back to half blocks (the picture would cover it)
        await pilot.press("p")
        await idle(pilot)
        assert not preview.drawing_graphics
        assert "\U0010eeee" not in "".join(s.text for s in preview.render_line(0))
        await pilot.press("escape")
        await idle(pilot)
        assert preview.drawing_graphics


async def test_sixel_terminal_gets_bands_at_the_preview_cells(project):
    fake_proposals(project)
    app = QueueApp(project, annotator="ana")
    async with app.run_test(size=SIZE) as pilot:
        await idle(pilot)
        preview = app.screen.query_one(TilePreview)
        note = preview.pick_graphics("auto", {"TERM": "foot"}, headless=False, truecolor=True,
                                     cell_px=(10, 20))
        assert note == "sixel graphics, full resolution"
        await idle(pilot)
        region = preview.content_region
        band = list(preview.render_line(0))[-1]
        assert band.control
        move = f"\x1b7\x1b[{region.y + 1};{region.x + 1}H"
        assert band.text.startswith(move + "\x1bP0;1;0q") and band.text.endswith("\x1b\\\x1b8")
        assert band.text in _screen_text(app)  # the compositor writes it whole
        # the first line carries the first 20 pixel rows of the tile fitted to the cells
        size = preview.content_size
        rgb = preview._rgb
        h, w = rgb.shape[:2]
        down, across = fit_cells((h, w), cols=size.width, rows=size.height, cell_px=(10, 20))
        scale = min(down * 20 / h, across * 10 / w)
        out = (int(h * scale + 1e-9), int(w * scale + 1e-9))
        picture = resize_nearest(rgb, out) if scale >= 1 else box_downsample(rgb, out)
        palette, index = median_cut(picture)
        assert band.text == move + sixel_encode(index[:20], palette) + "\x1b8"
        last = list(preview.render_line(down - 1))[-1]
        assert last.text == (f"\x1b7\x1b[{region.y + down};{region.x + 1}H"
                             + sixel_encode(index[(down - 1) * 20:down * 20], palette) + "\x1b8")


async def test_setting_off_keeps_half_blocks_in_a_kitty_terminal(project):
    fake_proposals(project)
    app = QueueApp(project, annotator="ana")
    async with app.run_test(size=SIZE) as pilot:
        await idle(pilot)
        preview = app.screen.query_one(TilePreview)
        note = preview.pick_graphics("off", KITTY, headless=False, truecolor=True)
        assert note == "half blocks (preview.graphics = off)"
        await idle(pilot)
        assert not preview.drawing_graphics and HALF_BLOCK in preview.render().plain
        assert "\x1b_G" not in _screen_text(app)
