"""Small widgets of the terminal queue: the tile preview and the work bar."""

from __future__ import annotations

import math
import os
import sys
from collections.abc import Mapping

import numpy as np
from rich.segment import Segment
from rich.text import Text
from textual import events
from textual.app import ComposeResult
from textual.containers import Horizontal
from textual.message import Message
from textual.strip import Strip
from textual.widget import Widget
from textual.widgets import Label, ProgressBar

from labeler.classes import ClassSchema
from labeler.tui.graphics import (
    cell_pixels,
    choose_graphics,
    fit_cells,
    kitty_lines,
    resize_nearest,
    sixel_lines,
)
from labeler.tui.preview import (
    ZOOM_LEVELS,
    box_downsample,
    fit_picture,
    half_block_text,
    zoom_picture,
    zoom_window,
)

__all__ = ["TilePreview", "WorkBar", "palette_legend"]


def palette_legend(schema: ClassSchema) -> Text:
    """One line naming each overlay class in its own colour (``"■ crop  ■ weed ..."``).

    Parameters
    ----------
    schema : ClassSchema
        The project's classes; those without an overlay colour are left out.

    Returns
    -------
    rich.text.Text
        The legend, or a note when no class has a colour.
    """
    text = Text(no_wrap=True, overflow="ellipsis")
    for c in schema:
        if c.colour is None:
            continue
        if text:
            text.append("  ")
        text.append("\u25a0 ", style=c.colour)
        text.append(c.name)
    if not text:
        text.append("no overlay colours in this schema")
    return text


#: Id of the preview's picture in a kitty-protocol terminal ("Lab" as 24-bit colour).
PREVIEW_IMAGE_ID = 0x4C6162
#: Cell size assumed where the terminal does not report it (pixels, width x height).
ASSUMED_CELL_PX = (10, 20)


class TilePreview(Widget):
    """The selected tile with its mask overlay, fitted to the widget.

    Drawn with half blocks (two pixels a cell) unless :meth:`use_graphics` chose a
    picture protocol: then the tile's own pixels go to the terminal (kitty protocol or
    sixels, :mod:`labeler.tui.graphics`) while this screen is the one on top; under a
    dialog the half blocks come back.

    :meth:`show` takes the full-resolution picture (the tile with the overlay already
    blended, :func:`labeler.tui.preview.overlay`, done in a worker); every render fits it
    to the widget's current content size, so resizing the terminal redraws it.

    Zoom: at :attr:`zoom` 1 the whole tile is shown; :meth:`zoom_by` steps through
    :data:`~labeler.tui.preview.ZOOM_LEVELS`, showing the part of the tile round
    :attr:`centre` (:func:`~labeler.tui.preview.zoom_picture`); a click on the picture
    centres it there (and zooms to 2 from 1). The zoom stays when another tile is shown;
    the centre goes back to the tile's middle. Each change posts :class:`Zoomed`.
    """

    class Zoomed(Message):
        """The zoom or its centre changed (:attr:`TilePreview.zoom_note` says how)."""

    def __init__(self, **kwargs) -> None:
        super().__init__(**kwargs)
        self.tile_id: int | None = None
        self._rgb: np.ndarray | None = None
        self._message = "no tile selected"
        self._cache: tuple[tuple, Text] | None = None
        self.zoom = 1
        self.centre: tuple[float, float] | None = None  # tile (row, col); None: the middle
        #: Tile rows and columns shown by the last render, ``(r0, r1, c0, c1)``.
        self.shown_window: tuple[int, int, int, int] | None = None
        self._picture_size: tuple[int, int] | None = None
        #: Picture protocol: "off" (half blocks), "kitty" or "sixel".
        self.graphics = "off"
        self.cell_px: tuple[int, int] | None = None
        self._graphics_cache: tuple[tuple, list[Strip]] | None = None
        self._shown = 0  # counts the pictures shown (part of the graphics cache key)

    def use_graphics(self, mode: str, *, cell_px: tuple[int, int] | None = None) -> None:
        """Draw with ``mode`` from now on.

        Parameters
        ----------
        mode : {"off", "kitty", "sixel"}
            The protocol (:func:`labeler.tui.graphics.choose_graphics` decides it).
        cell_px : (int, int), optional
            ``(width, height)`` of a cell in pixels; sixels need it, kitty pictures are
            sent at least :data:`ASSUMED_CELL_PX` per cell without it.

        Raises
        ------
        ValueError
            If ``mode`` is unknown, or sixels are asked for without ``cell_px``.
        """
        if mode not in ("off", "kitty", "sixel"):
            raise ValueError(f"mode: expected off, kitty or sixel, got {mode!r}")
        if mode == "sixel" and cell_px is None:
            raise ValueError("cell_px: sixels need the cell size in pixels, got None")
        self.graphics = mode
        self.cell_px = cell_px
        self._graphics_cache = None
        self._cache = None
        self.refresh()

    def pick_graphics(
        self,
        setting: str,
        environ: Mapping[str, str] | None = None,
        *,
        headless: bool | None = None,
        truecolor: bool | None = None,
        cell_px: tuple[int, int] | None = None,
    ) -> str:
        """Choose and use the protocol for ``setting`` and ``environ`` (no terminal query).

        Parameters
        ----------
        setting : str
            ``preview.graphics``.
        environ : mapping of str to str, optional
            The environment (default: the app's ``environ`` if it has one, else
            ``os.environ``).
        headless : bool, optional
            No terminal: half blocks whatever the rest says (default: the app's
            ``is_headless``, true under Pilot).
        truecolor : bool, optional
            The app writes 24-bit colours (default: from the app's console).
        cell_px : (int, int), optional
            Cell size in pixels; default: the kernel's window size of standard output
            (:func:`~labeler.tui.graphics.cell_pixels`), unless headless.

        Returns
        -------
        str
            The note of :func:`~labeler.tui.graphics.choose_graphics`.
        """
        if environ is None:
            environ = getattr(self.app, "environ", None)
            environ = os.environ if environ is None else environ
        headless = self.app.is_headless if headless is None else headless
        if truecolor is None:
            truecolor = self.app.console.color_system == "truecolor"
        if cell_px is None and not headless and sys.__stdout__ is not None:
            try:
                cell_px = cell_pixels(sys.__stdout__.fileno())
            except (OSError, ValueError):  # no file descriptor (captured output)
                cell_px = None
        mode, note = choose_graphics(setting, environ, headless=headless, cell_px=cell_px,
                                     truecolor=truecolor)
        self.use_graphics(mode, cell_px=cell_px if mode != "off" else None)
        return note

    @property
    def drawing_graphics(self) -> bool:
        """True while the picture goes to the terminal by protocol (not half blocks)."""
        if self.graphics == "off" or self._rgb is None:
            return False
        try:
            return bool(self.screen.is_active)
        except Exception:  # noqa: BLE001 - not mounted on a screen
            return False

    @property
    def zoom_note(self) -> str:
        """What the preview shows: ``""`` for the whole tile, else the zoom and the part."""
        if self.zoom == 1 or self.shown_window is None:
            return ""
        r0, r1, c0, c1 = self.shown_window
        return f"zoom x{self.zoom}: rows {r0}-{r1 - 1}, cols {c0}-{c1 - 1}"

    def zoom_by(self, steps: int) -> int:
        """Move ``steps`` zoom levels in (positive) or out (negative).

        Parameters
        ----------
        steps : int
            Levels of :data:`~labeler.tui.preview.ZOOM_LEVELS` to move; the ends hold.

        Returns
        -------
        int
            The zoom level now.
        """
        levels = list(ZOOM_LEVELS)
        k = min(max(levels.index(self.zoom) + int(steps), 0), len(levels) - 1)
        self.set_zoom(levels[k])
        return self.zoom

    def set_zoom(self, level: int, *, centre: tuple[float, float] | None = None) -> None:
        """Show zoom ``level``, round ``centre`` if given.

        Parameters
        ----------
        level : int
            One of :data:`~labeler.tui.preview.ZOOM_LEVELS` (1: the whole tile).
        centre : (float, float), optional
            Tile ``(row, col)`` to keep in the middle (default: the one set before, or the
            tile's middle).

        Raises
        ------
        ValueError
            If ``level`` is not a zoom level.
        """
        if level not in ZOOM_LEVELS:
            raise ValueError(
                f"level: expected one of {', '.join(map(str, ZOOM_LEVELS))}, got {level}"
            )
        self.zoom = int(level)
        if centre is not None:
            self.centre = (float(centre[0]), float(centre[1]))
        if self.zoom == 1:
            self.centre = None
        self._cache = None
        self.refresh()
        self.render()  # sets shown_window now, so the note is current
        self.post_message(self.Zoomed())

    def on_click(self, event: events.Click) -> None:
        """Centre the zoom on the clicked point of the tile (zoom 2 from the whole tile).

        Parameters
        ----------
        event : textual.events.Click
            The click; ``event.x, event.y`` are cells of the widget.
        """
        if self._rgb is None or self.shown_window is None or self._picture_size is None:
            return
        ph, pw = self._picture_size
        x, y = event.x, event.y
        if not (0 <= x < pw and 0 <= 2 * y < ph):
            return
        r0, r1, c0, c1 = self.shown_window
        row = r0 + (2 * y + 1) * (r1 - r0) / ph - 0.5  # the cell's middle, tile index units
        col = c0 + (x + 0.5) * (c1 - c0) / pw - 0.5
        self.set_zoom(max(self.zoom, 2), centre=(row, col))

    @property
    def picture_shape(self) -> tuple[int, int] | None:
        """``(height, width)`` in pixels of the last picture drawn, or None."""
        if self._cache is None:
            return None
        text = self._cache[1]
        lines = text.plain.split("\n")
        return (2 * len(lines), len(lines[0]))

    def show(self, tile_id: int, picture: np.ndarray) -> None:
        """Show a tile's picture.

        Parameters
        ----------
        tile_id : int
            The tile shown.
        picture : ndarray, shape (H, W, 3), uint8
            Its RGB picture with the overlay blended in; fitted to the widget when drawn.
        """
        if tile_id != self.tile_id:
            self.centre = None
        self.tile_id = tile_id
        self._rgb = picture
        self._shown += 1
        self._cache = None
        self.refresh()

    def show_message(self, message: str, *, tile_id: int | None = None) -> None:
        """Show a line of text instead of a picture (no tile, or the tile cannot be read).

        Parameters
        ----------
        message : str
            The text.
        tile_id : int, optional
            The tile the message is about.
        """
        self.tile_id = tile_id
        self._rgb = None
        self._message = message
        self._cache = None
        self.refresh()

    def _window(self, size: tuple[int, int]) -> tuple[int, int, int, int]:
        h, w = self._rgb.shape[:2]
        if self.zoom == 1:
            return (0, h, 0, w)
        centre = self.centre if self.centre is not None else ((h - 1) / 2, (w - 1) / 2)
        window, _ = zoom_window((h, w), zoom=self.zoom, centre=centre, cols=size[0],
                                rows=size[1])
        return window

    def render(self) -> Text:
        if self._rgb is None:
            return Text(self._message)
        size = (max(1, self.content_size.width), max(1, self.content_size.height))
        if self.drawing_graphics:
            self._graphics_strips(size)
            return Text("")
        key = (size, self.zoom, self.centre)
        if self._cache is not None and self._cache[0] == key:
            return self._cache[1]
        h, w = self._rgb.shape[:2]
        if self.zoom == 1:
            picture = fit_picture(self._rgb, cols=size[0], rows=size[1])
            self.shown_window = (0, h, 0, w)
        else:
            centre = self.centre if self.centre is not None else ((h - 1) / 2, (w - 1) / 2)
            picture, self.shown_window = zoom_picture(
                self._rgb, zoom=self.zoom, centre=centre, cols=size[0], rows=size[1]
            )
        self._picture_size = picture.shape[:2]
        text = half_block_text(picture)
        self._cache = (key, text)
        return text

    def _graphics_strips(self, size: tuple[int, int]) -> list[Strip]:
        """The preview's lines in the chosen protocol (cached per size, zoom and place)."""
        region = self.content_region
        key = (size, self.zoom, self.centre, self.graphics, self.cell_px, region.x, region.y,
               self._shown)
        if self._graphics_cache is not None and self._graphics_cache[0] == key:
            return self._graphics_cache[1]
        r0, r1, c0, c1 = self.shown_window = self._window(size)
        part = self._rgb[r0:r1, c0:c1]
        cell = self.cell_px or ASSUMED_CELL_PX
        down, across = fit_cells(part.shape[:2], cols=size[0], rows=size[1], cell_px=cell)
        self._picture_size = (2 * down, across)  # as half blocks: clicks map the same way
        style = self.rich_style
        box_h, box_w = down * cell[1], across * cell[0]
        if self.graphics == "kitty":
            k = max(1, math.floor(min(box_h / part.shape[0], box_w / part.shape[1])))
            picture = np.repeat(np.repeat(part, k, axis=0), k, axis=1) if k > 1 else part
            lines = kitty_lines(np.ascontiguousarray(picture), image_id=PREVIEW_IMAGE_ID,
                                cells=(down, across), width=size[0], height=size[1],
                                style=style)
        else:
            scale = min(box_h / part.shape[0], box_w / part.shape[1])
            out = (max(1, math.floor(part.shape[0] * scale + 1e-9)),
                   max(1, math.floor(part.shape[1] * scale + 1e-9)))
            picture = (resize_nearest(part, out) if scale >= 1
                       else box_downsample(np.ascontiguousarray(part), out))
            lines = sixel_lines(picture, origin=(region.x, region.y), cell_px=cell,
                                width=size[0], height=size[1], style=style)
        strips = [Strip(segs, size[0]) for segs in lines]
        self._graphics_cache = (key, strips)
        return strips

    def render_line(self, y: int) -> Strip:
        """Line ``y``: the protocol's line while :attr:`drawing_graphics`, else half blocks."""
        if self.drawing_graphics:
            size = (max(1, self.content_size.width), max(1, self.content_size.height))
            strips = self._graphics_strips(size)
            if 0 <= y < len(strips):
                return strips[y]
            return Strip([Segment(" " * size[0], self.rich_style)], size[0])
        return super().render_line(y)


class WorkBar(Horizontal):
    """A label and a progress bar for long work (hidden while idle)."""

    def compose(self) -> ComposeResult:
        yield Label("", id="work-label")
        yield ProgressBar(total=None, show_eta=False, id="work-bar")

    def start(self, label: str) -> None:
        """Show the bar for a new piece of work.

        Parameters
        ----------
        label : str
            What the work is, shown beside the bar.
        """
        self.query_one("#work-label", Label).update(label)
        self.query_one("#work-bar", ProgressBar).update(total=None, progress=0)
        self.add_class("busy")

    def step(self, done: int, total: int, label: str = "") -> None:
        """Move the bar on.

        Parameters
        ----------
        done, total : int
            Steps done and steps in all (a total of 0 leaves the bar running without an
            end).
        label : str
            Names the step (empty: keep the label).
        """
        bar = self.query_one("#work-bar", ProgressBar)
        if total and total > 0:
            bar.update(total=total, progress=min(done, total))
        if label:
            self.query_one("#work-label", Label).update(label)

    def stop(self) -> None:
        """Hide the bar."""
        self.remove_class("busy")
