"""Small widgets of the terminal queue: the tile preview and the work bar."""

from __future__ import annotations

import numpy as np
from rich.text import Text
from textual.app import ComposeResult
from textual.containers import Horizontal
from textual.widget import Widget
from textual.widgets import Label, ProgressBar

from labeler.classes import ClassSchema
from labeler.tui.preview import fit_picture, half_block_text

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


class TilePreview(Widget):
    """The selected tile with its mask overlay, drawn with half blocks, fitted to the widget.

    :meth:`show` takes the full-resolution picture (the tile with the overlay already
    blended, :func:`labeler.tui.preview.overlay`, done in a worker); every render fits it
    to the widget's current content size, so resizing the terminal redraws it.
    """

    def __init__(self, **kwargs) -> None:
        super().__init__(**kwargs)
        self.tile_id: int | None = None
        self._rgb: np.ndarray | None = None
        self._message = "no tile selected"
        self._cache: tuple[tuple[int, int], Text] | None = None

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
        self.tile_id = tile_id
        self._rgb = picture
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

    def render(self) -> Text:
        if self._rgb is None:
            return Text(self._message)
        size = (max(1, self.content_size.width), max(1, self.content_size.height))
        if self._cache is not None and self._cache[0] == size:
            return self._cache[1]
        text = half_block_text(fit_picture(self._rgb, cols=size[0], rows=size[1]))
        self._cache = (size, text)
        return text


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
