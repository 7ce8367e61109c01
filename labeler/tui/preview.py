"""The tile preview: an image with its proposal overlay drawn with half-block characters.

Every terminal cell shows two pixels stacked: the character "▀" (upper half block)
painted in the foreground colour of the upper pixel on the background colour of the
lower pixel. A picture of ``h`` x ``w`` pixels therefore takes ``ceil(h / 2)`` rows of
``w`` cells, and since a terminal cell is about twice as tall as it is wide, each
pixel comes out roughly square.

Zoom (:func:`zoom_picture`): from zoom 2 on, the preview shows the part of the tile
around a chosen point, enlarged by whole-pixel repetition once a tile pixel gets a preview
pixel or more -- the tile at full resolution, as far as a terminal cell grid can show it.

Pure numpy in, Rich :class:`~rich.text.Text` out: nothing here needs a running app, so
the renderer is tested on exact little arrays.
"""

from __future__ import annotations

import math

import numpy as np
from rich.color import Color
from rich.style import Style
from rich.text import Text

from labeler.classes import ClassSchema
from labeler.masks.overlay import overlay_mask

__all__ = [
    "HALF_BLOCK",
    "fit_pixels",
    "box_downsample",
    "overlay",
    "fit_picture",
    "tile_picture",
    "half_block_text",
    "ZOOM_LEVELS",
    "zoom_window",
    "zoom_picture",
]

#: Upper half block: foreground = upper pixel, background = lower pixel.
HALF_BLOCK = "\u2580"


def _check_rgb(rgb: object, name: str = "rgb") -> np.ndarray:
    img = np.asarray(rgb)
    if img.dtype != np.uint8 or img.ndim != 3 or img.shape[2] != 3:
        raise ValueError(
            f"{name}: expected a uint8 (H, W, 3) RGB array, got dtype {img.dtype} shape "
            f"{img.shape}; read tiles with labeler.imagery.read.open_image"
        )
    if img.shape[0] < 1 or img.shape[1] < 1:
        raise ValueError(f"{name}: expected at least one pixel, got shape {img.shape}")
    return img


def fit_pixels(shape: tuple[int, int], *, cols: int, rows: int) -> tuple[int, int]:
    """Size in pixels of a picture of ``shape`` shrunk to fit ``cols`` x ``rows`` cells.

    Parameters
    ----------
    shape : (int, int)
        ``(height, width)`` of the source picture in pixels, both at least 1.
    cols, rows : int
        Cells available (each cell shows one pixel across and two pixels down).

    Returns
    -------
    (int, int)
        ``(height, width)`` in pixels: the largest size with the source's aspect ratio
        (each side rounded down, at least 1) that fits ``cols`` pixels across and
        ``2 * rows`` pixels down. Pictures are never enlarged.

    Raises
    ------
    ValueError
        If ``cols`` or ``rows`` is below 1 or ``shape`` has a side below 1.
    """
    h, w = (int(v) for v in shape)
    if h < 1 or w < 1:
        raise ValueError(f"shape: expected (height, width) of at least 1 pixel, got {shape}")
    if cols < 1 or rows < 1:
        raise ValueError(
            f"cols, rows: expected at least one cell each, got cols={cols} rows={rows}; "
            "give the preview some room"
        )
    scale = min(1.0, cols / w, (2 * rows) / h)
    return max(1, min(h, math.floor(h * scale + 1e-9))), max(1, min(w, math.floor(w * scale + 1e-9)))


def _edges(n_in: int, n_out: int) -> np.ndarray:
    """Start index of each of ``n_out`` blocks covering ``n_in`` samples (strictly rising)."""
    return (np.arange(n_out, dtype=np.int64) * n_in) // n_out


def box_downsample(rgb: np.ndarray, out_shape: tuple[int, int]) -> np.ndarray:
    """Shrink an RGB picture by averaging blocks of pixels.

    Output pixel ``(i, j)`` is the mean of the source rows ``floor(i * H / h)`` up to
    (not including) ``floor((i + 1) * H / h)`` and the columns likewise, rounded half up.

    Parameters
    ----------
    rgb : ndarray, shape (H, W, 3), uint8
    out_shape : (int, int)
        ``(h, w)`` with ``1 <= h <= H`` and ``1 <= w <= W``.

    Returns
    -------
    ndarray, shape (h, w, 3), uint8
        A copy even when ``(h, w) == (H, W)``.

    Raises
    ------
    ValueError
        If ``rgb`` is not (H, W, 3) uint8 or ``out_shape`` would enlarge or is empty.
    """
    img = _check_rgb(rgb)
    big_h, big_w = img.shape[:2]
    h, w = (int(v) for v in out_shape)
    if not (1 <= h <= big_h and 1 <= w <= big_w):
        raise ValueError(
            f"out_shape: expected 1..{big_h} rows and 1..{big_w} columns (no enlarging), "
            f"got {tuple(out_shape)}"
        )
    if (h, w) == (big_h, big_w):
        return img.copy()
    r_edges, c_edges = _edges(big_h, h), _edges(big_w, w)
    sums = np.add.reduceat(img.astype(np.int64), r_edges, axis=0)
    sums = np.add.reduceat(sums, c_edges, axis=1)
    r_len = np.diff(np.append(r_edges, big_h))
    c_len = np.diff(np.append(c_edges, big_w))
    counts = np.multiply.outer(r_len, c_len)[:, :, None]
    # integer half-up rounding of sums / counts: floor((2 * s + n) / (2 * n))
    return ((2 * sums + counts) // (2 * counts)).astype(np.uint8)


def overlay(
    rgb: np.ndarray,
    mask: np.ndarray | None,
    *,
    schema: ClassSchema,
    opacity: float = 0.45,
) -> np.ndarray:
    """The tile with its mask blended over it, at full resolution.

    Parameters
    ----------
    rgb : ndarray, shape (H, W, 3), uint8
        Tile pixels.
    mask : ndarray, shape (H, W), integer, or None
        Class indices of the proposal (or a saved mask); classes without a colour (soil)
        and unlabelled pixels (255) get no overlay. ``None`` gives the bare tile.
    schema : ClassSchema
        Gives the overlay colours.
    opacity : float
        Weight of the class colour, 0..1 (the project's ``editor.opacity``, 0.45):
        ``round_half_up((1 - opacity) * pixel + opacity * colour)``, the one overlay of
        every picture (:func:`labeler.masks.overlay.overlay_mask`).

    Returns
    -------
    ndarray, shape (H, W, 3), uint8
    """
    img = _check_rgb(rgb)
    if mask is None:
        return img.copy()
    return overlay_mask(img, mask, schema=schema, opacity=opacity)


def fit_picture(picture: np.ndarray, *, cols: int, rows: int) -> np.ndarray:
    """Shrink ``picture`` (H, W, 3) uint8 to fit ``cols`` x ``rows`` cells.

    Blocks are averaged (:func:`box_downsample`) to the size :func:`fit_pixels` gives,
    so a thin weed still tints its block.

    Parameters
    ----------
    picture : ndarray, shape (H, W, 3), uint8
        The picture to shrink.
    cols, rows : int
        Cells available (each cell shows one pixel across and two pixels down).

    Returns
    -------
    ndarray, shape (h, w, 3), uint8
        The shrunk picture, ``(h, w)`` from :func:`fit_pixels`.
    """
    img = _check_rgb(picture, "picture")
    return box_downsample(img, fit_pixels(img.shape[:2], cols=cols, rows=rows))


def tile_picture(
    rgb: np.ndarray,
    mask: np.ndarray | None = None,
    *,
    schema: ClassSchema,
    opacity: float = 0.45,
    cols: int,
    rows: int,
) -> np.ndarray:
    """What the preview shows: :func:`overlay` then :func:`fit_picture`.

    Parameters
    ----------
    rgb : ndarray, shape (H, W, 3), uint8
        Tile pixels.
    mask : ndarray, shape (H, W), integer, or None
        The mask to blend over them (None: the bare tile).
    schema : ClassSchema
        Gives the overlay colours.
    opacity : float
        Weight of the class colour, 0..1.
    cols, rows : int
        Cells available.

    Returns
    -------
    ndarray, shape (h, w, 3), uint8
        The overlay is blended at full resolution before blocks are averaged.
    """
    return fit_picture(overlay(rgb, mask, schema=schema, opacity=opacity), cols=cols, rows=rows)


def _style(top: np.ndarray, bottom: np.ndarray | None) -> Style:
    fg = Color.from_rgb(int(top[0]), int(top[1]), int(top[2]))
    if bottom is None:
        return Style(color=fg)
    return Style(color=fg, bgcolor=Color.from_rgb(int(bottom[0]), int(bottom[1]), int(bottom[2])))


def half_block_text(rgb: np.ndarray) -> Text:
    """Render a picture as lines of half blocks in true colour.

    Parameters
    ----------
    rgb : ndarray, shape (H, W, 3), uint8

    Returns
    -------
    rich.text.Text
        ``ceil(H / 2)`` lines of ``W`` characters "▀" joined by newlines. The cell in
        line ``k``, column ``j`` has foreground = pixel ``(2k, j)`` and background =
        pixel ``(2k + 1, j)``. With an odd ``H`` the last line has no background colour
        (the widget's own background shows in the lower halves).
    """
    img = _check_rgb(rgb)
    h, w = img.shape[:2]
    text = Text(no_wrap=True, overflow="crop", end="")
    styles: dict[bytes, Style] = {}
    for k in range(0, h, 2):
        if k:
            text.append("\n")
        top_row = img[k]
        bottom_row = img[k + 1] if k + 1 < h else None
        for j in range(w):
            key = top_row[j].tobytes() + (b"" if bottom_row is None else bottom_row[j].tobytes())
            style = styles.get(key)
            if style is None:
                style = styles[key] = _style(
                    top_row[j], None if bottom_row is None else bottom_row[j]
                )
            text.append(HALF_BLOCK, style)
    return text


#: Zoom levels of the preview: 1 fits the whole tile; each level doubles the magnification.
ZOOM_LEVELS = (1, 2, 4, 8, 16)


def zoom_window(
    shape: tuple[int, int],
    *,
    zoom: int,
    centre: tuple[float, float],
    cols: int,
    rows: int,
) -> tuple[tuple[int, int, int, int], float]:
    """The part of a tile the zoomed preview shows, and its magnification.

    At zoom 1 the whole tile fits ``cols`` x ``2 * rows`` pixels (magnification
    ``m1 = min(cols / W, 2 * rows / H)``); zoom ``k`` magnifies by ``k * m1`` and shows
    the part of the tile around ``centre`` that fits, moved inside the tile when the
    centre is near an edge.

    Parameters
    ----------
    shape : (int, int)
        ``(H, W)`` of the tile, at least 1 each.
    zoom : int
        At least 1.
    centre : (float, float)
        Tile ``(row, col)`` to keep in the middle.
    cols, rows : int
        Cells available (each one pixel across and two down).

    Returns
    -------
    ((r0, r1, c0, c1), magnification) : ((int, int, int, int), float)
        Rows ``r0:r1`` and columns ``c0:c1`` of the tile shown, and preview pixels per
        tile pixel.

    Raises
    ------
    ValueError
        If ``zoom`` is below 1 or a size is below 1.
    """
    h, w = (int(v) for v in shape)
    if h < 1 or w < 1 or cols < 1 or rows < 1:
        raise ValueError(
            f"shape, cols, rows: expected sizes of at least 1, got {shape}, cols={cols}, "
            f"rows={rows}"
        )
    if int(zoom) < 1:
        raise ValueError(f"zoom: expected a level of 1 or more, got {zoom}")
    mag = int(zoom) * min(cols / w, 2 * rows / h)
    win_h = min(h, max(1, math.floor(2 * rows / mag + 1e-9)))
    win_w = min(w, max(1, math.floor(cols / mag + 1e-9)))
    r0 = int(round(float(centre[0]) + 0.5 - win_h / 2))
    c0 = int(round(float(centre[1]) + 0.5 - win_w / 2))
    r0 = min(max(r0, 0), h - win_h)
    c0 = min(max(c0, 0), w - win_w)
    return (r0, r0 + win_h, c0, c0 + win_w), mag


def zoom_picture(
    picture: np.ndarray,
    *,
    zoom: int,
    centre: tuple[float, float],
    cols: int,
    rows: int,
) -> tuple[np.ndarray, tuple[int, int, int, int]]:
    """The zoomed preview: the part of ``picture`` :func:`zoom_window` gives, sized to fit.

    A part shown smaller than the cells is enlarged by repeating pixels (each tile pixel
    a block of whole preview pixels: nothing is smoothed, so thin leaves and lesions stay
    as sharp as in the tile); a part larger is shrunk by averaging blocks
    (:func:`box_downsample`), as at zoom 1.

    Parameters
    ----------
    picture : ndarray, shape (H, W, 3), uint8
        The tile with its overlay.
    zoom, centre, cols, rows
        As for :func:`zoom_window`.

    Returns
    -------
    (ndarray, (r0, r1, c0, c1))
        The preview pixels, shape (h, w, 3) uint8 with ``h <= 2 * rows`` and
        ``w <= cols``, and the tile rows and columns they show.
    """
    img = _check_rgb(picture, "picture")
    (r0, r1, c0, c1), mag = zoom_window(img.shape[:2], zoom=zoom, centre=centre, cols=cols,
                                        rows=rows)
    part = img[r0:r1, c0:c1]
    if mag < 1:
        return fit_picture(part, cols=cols, rows=rows), (r0, r1, c0, c1)
    k = max(1, math.floor(mag + 1e-9))
    k = min(k, max(1, (2 * rows) // part.shape[0]), max(1, cols // part.shape[1]))
    return np.repeat(np.repeat(part, k, axis=0), k, axis=1), (r0, r1, c0, c1)
