"""Which picture protocol the preview uses, and the preview's lines in each protocol.

The preview draws the tile with half blocks in any true-colour terminal
(:mod:`labeler.tui.preview`). Terminals with a graphics protocol get the tile's own
pixels instead: the kitty protocol (:mod:`labeler.tui.graphics_kitty`) or DEC sixels
(:mod:`labeler.tui.graphics_sixel`). Which one is decided from the project setting
``preview.graphics`` and the environment alone (:func:`choose_graphics`): the terminal
is never asked anything, so starting the queue (and importing this module) never waits
for an answer and never writes to the screen. Headless apps (tests under Pilot) always
get half blocks.

:func:`kitty_lines` and :func:`sixel_lines` give the preview's lines as Rich segments
ready for Textual: kitty placeholder cells are ordinary one-cell text; sixel data ride
at the *end* of each line as a zero-width control segment (Rich ``Segment.control``;
Textual counts such segments as no cells and, when it cuts a line, keeps or drops them
whole), wrapped in save-cursor / restore-cursor so the text after them lands where
Textual expects it.
"""

from __future__ import annotations

import struct
from collections.abc import Mapping

import numpy as np
from rich.color import Color
from rich.segment import ControlType, Segment
from rich.style import Style

from labeler.tui.graphics_kitty import MAX_CELLS, id_colour, kitty_transmit, placeholder_cell
from labeler.tui.graphics_sixel import median_cut, sixel_encode

__all__ = [
    "GRAPHICS_MODES",
    "KITTY_TERMS",
    "SIXEL_TERMS",
    "detect_graphics",
    "choose_graphics",
    "cell_pixels",
    "fit_cells",
    "resize_nearest",
    "kitty_lines",
    "sixel_lines",
]

#: Values of the ``preview.graphics`` setting.
GRAPHICS_MODES = ("auto", "kitty", "sixel", "off")

#: Environment values of terminals whose documentation says they draw kitty-protocol
#: pictures with Unicode placeholders: ``(variable, value)``.
KITTY_TERMS = (("TERM", "xterm-kitty"), ("TERM", "xterm-ghostty"), ("TERM_PROGRAM", "ghostty"))
#: Likewise for DEC sixels (foot, mlterm, WezTerm).
SIXEL_TERMS = (("TERM", "foot"), ("TERM", "foot-extra"), ("TERM", "mlterm"),
               ("TERM_PROGRAM", "WezTerm"))

#: Marks a segment as control (zero cells wide); the text is written as it is.
_CONTROL = ((ControlType.CURSOR_FORWARD, 0),)


def detect_graphics(environ: Mapping[str, str]) -> str:
    """The protocol the environment names: ``"kitty"``, ``"sixel"`` or ``"off"``.

    Inside tmux or screen (``TMUX`` set, ``TERM`` starting ``screen`` or ``tmux``) the
    answer is ``"off"``: those pass pictures on only when configured to.

    Parameters
    ----------
    environ : mapping of str to str
        The environment (``os.environ``).

    Returns
    -------
    str
        ``"kitty"`` for :data:`KITTY_TERMS` or a set ``KITTY_WINDOW_ID``, ``"sixel"`` for
        :data:`SIXEL_TERMS`, else ``"off"``.
    """
    term = environ.get("TERM", "")
    if environ.get("TMUX") or term.startswith(("screen", "tmux")):
        return "off"
    if environ.get("KITTY_WINDOW_ID") or any(environ.get(k) == v for k, v in KITTY_TERMS):
        return "kitty"
    if any(environ.get(k) == v for k, v in SIXEL_TERMS):
        return "sixel"
    return "off"


def choose_graphics(
    setting: str,
    environ: Mapping[str, str],
    *,
    headless: bool,
    cell_px: tuple[int, int] | None,
    truecolor: bool = True,
) -> tuple[str, str]:
    """The preview's protocol and a few words saying why.

    Parameters
    ----------
    setting : str
        ``preview.graphics``: one of :data:`GRAPHICS_MODES` (``"auto"`` asks
        :func:`detect_graphics`; ``"kitty"`` and ``"sixel"`` force one).
    environ : mapping of str to str
        The environment.
    headless : bool
        The app runs without a terminal (tests): always half blocks.
    cell_px : (int, int) or None
        ``(width, height)`` of a cell in pixels (:func:`cell_pixels`); sixels need it.
    truecolor : bool
        The app writes 24-bit colours; kitty placeholders name the picture by one.

    Returns
    -------
    (str, str)
        ``"kitty"``, ``"sixel"`` or ``"off"`` (half blocks), and the note.

    Raises
    ------
    ValueError
        If ``setting`` is not one of :data:`GRAPHICS_MODES`.
    """
    if setting not in GRAPHICS_MODES:
        raise ValueError(
            f"preview.graphics: expected one of {', '.join(GRAPHICS_MODES)}, got {setting!r}"
        )
    if headless:
        return "off", "half blocks (headless)"
    mode = detect_graphics(environ) if setting == "auto" else setting
    if mode == "sixel" and cell_px is None:
        return "off", "half blocks (sixels need the cell size, not reported here)"
    if mode == "kitty" and not truecolor:
        return "off", "half blocks (kitty pictures need 24-bit colour: set COLORTERM=truecolor)"
    if mode == "off":
        return "off", "half blocks" + (" (preview.graphics = off)" if setting == "off" else "")
    return mode, f"{mode} graphics, full resolution"


def cell_pixels(fd: int) -> tuple[int, int] | None:
    """``(width, height)`` of a terminal cell in pixels, from the kernel's window size.

    Reads ``TIOCGWINSZ`` (rows, columns and, where the terminal reports them, the window's
    pixels); nothing is written to or read from the terminal itself.

    Parameters
    ----------
    fd : int
        A file descriptor of the terminal.

    Returns
    -------
    (int, int) or None
        None when ``fd`` is no terminal or the pixel size is not reported (0).
    """
    try:
        import fcntl
        import termios
    except ImportError:  # not a POSIX system: no window size in pixels to read
        return None
    try:
        raw = fcntl.ioctl(fd, termios.TIOCGWINSZ, b"\0" * 8)
    except OSError:
        return None
    rows, cols, xpix, ypix = struct.unpack("HHHH", raw)
    if not (rows and cols and xpix and ypix):
        return None
    return xpix // cols, ypix // rows


def fit_cells(
    shape: tuple[int, int], *, cols: int, rows: int, cell_px: tuple[int, int] = (1, 2)
) -> tuple[int, int]:
    """Cells a picture of ``shape`` covers when fitted into ``cols`` x ``rows`` cells.

    Parameters
    ----------
    shape : (int, int)
        ``(height, width)`` in pixels, at least 1 each.
    cols, rows : int
        Cells available, at least 1 each (and at most :data:`MAX_CELLS` are used).
    cell_px : (int, int)
        ``(width, height)`` of a cell (pixels or any unit; (1, 2) is the usual shape).

    Returns
    -------
    (int, int)
        ``(cells_down, cells_across)``: the largest with the picture's aspect ratio (each
        rounded, at least 1) inside the space.
    """
    h, w = (int(v) for v in shape)
    cw, ch = cell_px
    cols, rows = min(int(cols), MAX_CELLS), min(int(rows), MAX_CELLS)
    scale = min(cols * cw / w, rows * ch / h)
    across = min(cols, max(1, round(w * scale / cw)))
    down = min(rows, max(1, round(h * scale / ch)))
    return down, across


def resize_nearest(rgb: np.ndarray, out_shape: tuple[int, int]) -> np.ndarray:
    """Resize by taking, for each output pixel, the source pixel its centre falls in.

    Parameters
    ----------
    rgb : ndarray, shape (H, W, 3)
    out_shape : (int, int)
        ``(h, w)``, at least 1 each.

    Returns
    -------
    ndarray, shape (h, w, 3)
        Output ``(i, j)`` is source ``(floor((i + 0.5) H / h), floor((j + 0.5) W / w))``.
    """
    big_h, big_w = rgb.shape[:2]
    h, w = (max(1, int(v)) for v in out_shape)
    rows = ((2 * np.arange(h) + 1) * big_h) // (2 * h)
    cols = ((2 * np.arange(w) + 1) * big_w) // (2 * w)
    return rgb[rows[:, None], cols[None, :]]


def _pad(segments: list[Segment], used: int, width: int, style: Style | None) -> list[Segment]:
    if width > used:
        segments.append(Segment(" " * (width - used), style))
    return segments


def kitty_lines(
    picture: np.ndarray,
    *,
    image_id: int,
    cells: tuple[int, int],
    width: int,
    height: int,
    style: Style | None = None,
) -> list[list[Segment]]:
    """The preview's lines: kitty placeholders, and the escape that sends ``picture``.

    Parameters
    ----------
    picture : ndarray, shape (H, W, 3), uint8
        What to show (sent as it is; the terminal scales it to the cells).
    image_id : int
        1..16777215.
    cells : (int, int)
        ``(cells_down, cells_across)`` the picture covers (:func:`fit_cells`).
    width, height : int
        The preview's size in cells; lines are padded to ``width`` with ``style``.
    style : rich.style.Style, optional
        Style of the padding (the widget's background).

    Returns
    -------
    list of list of Segment
        ``height`` lines, each ``width`` cells: one segment per placeholder cell, its
        colour the 24-bit colour naming ``image_id``, then padding. The first line ends with the
        escape that sends the picture
        (:func:`~labeler.tui.graphics_kitty.kitty_transmit`) as a zero-width control
        segment: at a line's end Textual never cuts it, and the terminal draws the
        placeholders once the picture has arrived.
    """
    down, across = cells
    escape = kitty_transmit(picture, image_id=image_id, cols=across, rows=down)
    colour = Style(color=Color.from_rgb(*id_colour(image_id)))
    lines = []
    for y in range(height):
        segs: list[Segment] = []
        if y < down:
            segs = [Segment(placeholder_cell(y, x), colour) for x in range(across)]
        lines.append(_pad(segs, across if y < down else 0, width, style))
    if lines:
        lines[0].append(Segment(escape, None, _CONTROL))
    return lines


def sixel_lines(
    picture: np.ndarray,
    *,
    origin: tuple[int, int],
    cell_px: tuple[int, int],
    width: int,
    height: int,
    style: Style | None = None,
) -> list[list[Segment]]:
    """The preview's lines with the picture as sixels, one band of cells per line.

    Line ``y`` is ``width`` blank cells, then a zero-width control segment: save cursor
    (``ESC 7``), move to the line's first cell (``CSI row;col H``, 1-based screen
    position), the sixels of picture rows ``y * ch .. (y + 1) * ch``, restore cursor
    (``ESC 8``). The palette is made once for the whole picture
    (:func:`~labeler.tui.graphics_sixel.median_cut`); each line defines the colours it
    uses. Every line draws its own part, so a line Textual paints again is drawn
    again whole.

    Parameters
    ----------
    picture : ndarray, shape (H, W, 3), uint8
        The picture, already at its screen size in pixels (``W <= width * cw``).
    origin : (int, int)
        Screen ``(x, y)`` of the preview's top-left cell, from 0.
    cell_px : (int, int)
        ``(cw, ch)`` cell size in pixels.
    width, height : int
        The preview's size in cells.
    style : rich.style.Style, optional
        Style of the blank cells.

    Returns
    -------
    list of list of Segment
        ``height`` lines.
    """
    ch = int(cell_px[1])
    x0, y0 = origin
    palette, index = median_cut(picture)  # one palette: no seams between the lines
    lines = []
    for y in range(height):
        segs = [Segment(" " * width, style)]
        band = index[y * ch : (y + 1) * ch]
        if band.shape[0]:
            data = sixel_encode(band, palette)
            move = f"\x1b7\x1b[{y0 + y + 1};{x0 + 1}H"
            segs.append(Segment(move + data + "\x1b8", None, _CONTROL))
        lines.append(segs)
    return lines
