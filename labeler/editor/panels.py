"""Text drawn over the editor's frame: the status strip, question panels, the help table.

Everything here draws onto BGR arrays with OpenCV's Hershey font; nothing opens a window.
The frame the window shows is the view (:meth:`labeler.editor.state.EditorState.render`)
with, below it, a status strip of :data:`STATUS_ROWS` pixels.
"""

from __future__ import annotations

from collections.abc import Sequence

import cv2
import numpy as np

__all__ = ["STATUS_ROWS", "TEXT_COLOUR", "ACCENT_COLOUR", "LEGEND_SWATCH", "text", "panel",
           "table_panel", "status_strip", "legend_line"]

#: Height in pixels of the status strip under the view (three lines and the legend).
STATUS_ROWS = 76
#: Side in pixels of a class colour swatch in the legend line.
LEGEND_SWATCH = 10
#: Width in pixels of the heat map's colour scale in the legend line.
_SCALE_PX = 100
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


def legend_line(strip: np.ndarray, legend: Sequence[tuple[str, tuple[int, int, int] | None]],
                *, baseline: int, heat: bool = False) -> list[tuple[int, int]]:
    """Draw the class legend (a swatch and "digit name" per class) and, with ``heat``, the
    heat map's colour scale, along one line of the strip, in place.

    Parameters
    ----------
    strip : ndarray, shape (rows, cols, 3), uint8, BGR
    legend : sequence of (str, (int, int, int) or None)
        Label and BGR colour of each class; None draws a hollow swatch (no overlay).
    baseline : int
        Pixel row of the text baseline.
    heat : bool
        Also draw the scale of the uncertainty heat map: OpenCV's INFERNO colour map from
        the tile's lowest uncertainty (left, "sure") to its highest (right, "unsure").

    Returns
    -------
    list of (int, int)
        ``(row, col)`` of the top-left corner of each swatch, in ``legend`` order.
    """
    x, corners = 6, []
    top = baseline - LEGEND_SWATCH + 1
    for label, colour in legend:
        corners.append((top, x))
        if colour is None:
            cv2.rectangle(strip, (x, top), (x + LEGEND_SWATCH - 1, baseline), TEXT_COLOUR, 1)
        else:
            strip[top : baseline + 1, x : x + LEGEND_SWATCH] = colour
        text(strip, label, (x + LEGEND_SWATCH + 4, baseline), scale=0.42)
        x += LEGEND_SWATCH + 4 + cv2.getTextSize(label, _FONT, 0.42, 1)[0][0] + 14
    if heat:
        text(strip, "heat map: sure", (x, baseline), scale=0.42)
        x += cv2.getTextSize("heat map: sure", _FONT, 0.42, 1)[0][0] + 6
        ramp = np.round(np.linspace(0, 255, _SCALE_PX)).astype(np.uint8)[None, :]
        bar = cv2.applyColorMap(ramp, cv2.COLORMAP_INFERNO)  # (1, _SCALE_PX, 3) BGR
        end = min(x + _SCALE_PX, strip.shape[1])
        strip[top : baseline + 1, x:end] = bar[:, : end - x]
        text(strip, "unsure", (end + 6, baseline), scale=0.42)
    return corners


def status_strip(lines: Sequence[str], *, cols: int,
                 legend: Sequence[tuple[str, tuple[int, int, int] | None]] = (),
                 heat: bool = False) -> np.ndarray:
    """The strip under the view: up to three lines (the last in the accent colour), then
    the class legend and, with ``heat``, the heat map's scale (:func:`legend_line`).

    Parameters
    ----------
    lines : sequence of str
    cols : int
        Width in pixels (the view's).
    legend : sequence of (str, (int, int, int) or None)
        The classes' labels and BGR colours; () leaves the fourth line empty.
    heat : bool
        The heat map is on: draw its scale.

    Returns
    -------
    strip : ndarray, shape (STATUS_ROWS, cols, 3), uint8, BGR
    """
    strip = np.full((STATUS_ROWS, cols, 3), 24, np.uint8)
    for i, line in enumerate(lines):
        colour = ACCENT_COLOUR if i == 2 else TEXT_COLOUR
        text(strip, line, (6, 16 + 18 * i), scale=0.42, colour=colour)
    if legend or heat:
        legend_line(strip, legend, baseline=16 + 18 * 3, heat=heat)
    return strip
