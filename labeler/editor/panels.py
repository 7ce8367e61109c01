"""Text drawn over the editor's frame: the status strip, question panels, the help table.

Everything here draws onto BGR arrays with OpenCV's Hershey font; nothing opens a window.
The frame the window shows is the view (:meth:`labeler.editor.state.EditorState.render`)
with, below it, a status strip of :data:`STATUS_ROWS` pixels.
"""

from __future__ import annotations

from collections.abc import Sequence

import cv2
import numpy as np

__all__ = ["STATUS_ROWS", "TEXT_COLOUR", "ACCENT_COLOUR", "text", "panel", "table_panel",
           "status_strip"]

#: Height in pixels of the status strip under the view.
STATUS_ROWS = 58
#: BGR of ordinary text.
TEXT_COLOUR = (235, 235, 235)
#: BGR of keys in the help table and of the status strip's message line.
ACCENT_COLOUR = (120, 200, 255)

_FONT = cv2.FONT_HERSHEY_SIMPLEX


def text(img: np.ndarray, line: str, org: tuple[int, int], *, scale: float = 0.45,
         colour: tuple[int, int, int] = TEXT_COLOUR) -> None:
    """Draw one line of text at ``org`` = (x, y) of its baseline start, in place.

    Parameters
    ----------
    img : ndarray, shape (rows, cols, 3), uint8, BGR
    line : str
    org : (int, int)
        OpenCV point ``(x, y)``.
    scale : float
        Font scale.
    colour : (int, int, int)
        BGR.
    """
    # drawn on dark panels only: no outline (a thicker glyph run is wider in OpenCV 5)
    cv2.putText(img, line, org, _FONT, scale, colour, 1, cv2.LINE_AA)


def panel(img: np.ndarray, lines: Sequence[str], *, top: int, left: int, line_px: int = 17,
          scale: float = 0.42) -> None:
    """Dark translucent panel with lines of text, in columns when they do not fit.

    Parameters
    ----------
    img : ndarray, shape (rows, cols, 3), uint8, BGR
        Drawn on in place.
    lines : sequence of str
    top, left : int
        Pixel row and column of the panel's corner.
    line_px : int
        Pixels per line.
    scale : float
        Font scale.
    """
    h, w = img.shape[:2]
    rows_fit = max((h - top - 8) // line_px, 1)
    columns = [lines[i : i + rows_fit] for i in range(0, len(lines), rows_fit)]
    col_w = max((w - left - 8) // max(len(columns), 1), 1)
    height = min(len(columns[0]) * line_px + 10, h - top)
    region = img[top : top + height, left : w - 4]
    region[:] = (region * 0.25).astype(np.uint8)
    for k, col in enumerate(columns):
        for i, line in enumerate(col):
            text(img, line, (left + 6 + k * col_w, top + 14 + i * line_px), scale=scale)


def table_panel(img: np.ndarray, rows: Sequence[tuple[str, str]], *, top: int,
                left: int) -> None:
    """Dark panel with a two-field table (key, meaning), in as many columns as it needs,
    shrinking the text until it fits.

    Parameters
    ----------
    img : ndarray, shape (rows, cols, 3), uint8, BGR
        Drawn on in place.
    rows : sequence of (str, str)
    top, left : int
        Pixel row and column of the panel's corner.
    """
    h, w = img.shape[:2]
    scale = 0.42
    while True:
        line_px = int(round(40 * scale))
        per_col = max((h - top - 12) // line_px, 1)
        cols = [rows[i : i + per_col] for i in range(0, len(rows), per_col)]
        widths = []
        for col in cols:
            kw = max(cv2.getTextSize(k, _FONT, scale, 1)[0][0] for k, _ in col)
            vw = max(cv2.getTextSize(v, _FONT, scale, 1)[0][0] for _, v in col)
            widths.append((kw, vw))
        total = sum(kw + vw + 28 for kw, vw in widths)
        if total <= w - left - 8 or scale <= 0.26:
            break
        scale *= 0.9
    height = min(len(cols[0]) * line_px + 12, h - top)
    region = img[top : top + height, left : w - 4]
    region[:] = (region * 0.2).astype(np.uint8)
    x = left + 6
    for col, (kw, vw) in zip(cols, widths, strict=True):
        for i, (k, v) in enumerate(col):
            y = top + line_px + i * line_px - 2
            text(img, k, (x, y), scale=scale, colour=ACCENT_COLOUR)
            text(img, v, (x + kw + 10, y), scale=scale)
        x += kw + vw + 28


def status_strip(lines: Sequence[str], *, cols: int) -> np.ndarray:
    """The strip under the view: up to three lines, the last in the accent colour.

    Parameters
    ----------
    lines : sequence of str
    cols : int
        Width in pixels (the view's).

    Returns
    -------
    strip : ndarray, shape (STATUS_ROWS, cols, 3), uint8, BGR
    """
    strip = np.full((STATUS_ROWS, cols, 3), 24, np.uint8)
    for i, line in enumerate(lines):
        colour = ACCENT_COLOUR if i == 2 else TEXT_COLOUR
        text(strip, line, (6, 16 + 18 * i), scale=0.42, colour=colour)
    return strip
