"""The kitty terminal graphics protocol: pictures sent to the terminal and placed in cells.

Source: "Terminal graphics protocol", kitty documentation,
https://sw.kovidgoyal.net/kitty/graphics-protocol/ (sections "Transferring pixel data",
"Remote client" on chunking, and "Unicode placeholders").

A picture is sent as an APC escape ``ESC _ G <keys> ; <base64 payload> ESC \\``:
``f=24`` raw RGB, ``s``/``v`` its width and height in pixels, ``o=z`` a zlib-deflated
payload, ``i`` the image id, ``q=2`` no replies from the terminal (so nothing arrives on
the program's input). A payload longer than 4096 bytes goes in chunks of 4096 bytes
(a multiple of 4): every chunk but the last carries ``m=1``, the last ``m=0``, and only
the first carries the other keys.

``a=T,U=1,c=<cols>,r=<rows>`` stores the picture and makes a *virtual placement* of it
over ``cols`` x ``rows`` cells. The picture appears where the program writes the
placeholder character U+10EEEE with the image id as its 24-bit foreground colour
(``38;2;<r>;<g>;<b>``, id = ``r * 65536 + g * 256 + b``) and two combining marks naming the cell's row and column inside the
picture (:data:`DIACRITICS`). To the program -- and to Textual's compositor -- those
cells are ordinary text one cell wide, so a dialog over the preview hides the picture
like any other text, and nothing is drawn where the program does not write.

Pure Python and numpy; no terminal is queried.
"""

from __future__ import annotations

import base64
import zlib

import numpy as np

__all__ = [
    "PLACEHOLDER",
    "DIACRITICS",
    "MAX_CELLS",
    "MAX_IMAGE_ID",
    "id_colour",
    "CHUNK_BYTES",
    "kitty_transmit",
    "placeholder_cell",
]

#: The placeholder character of the protocol's "Unicode placeholders".
PLACEHOLDER = "\U0010eeee"

#: Row/column numbers 0, 1, 2, ... as combining marks: the first 128 entries of the
#: protocol's table (kitty's ``rowcolumn-diacritics.txt``: characters of general category
#: Mn, combining class 230, without decomposition, in Unicode 6.0.0, less a listed few).
DIACRITICS = tuple(chr(c) for c in (
    0x0305, 0x030D, 0x030E, 0x0310, 0x0312, 0x033D, 0x033E, 0x033F, 0x0346, 0x034A,
    0x034B, 0x034C, 0x0350, 0x0351, 0x0352, 0x0357, 0x035B, 0x0363, 0x0364, 0x0365,
    0x0366, 0x0367, 0x0368, 0x0369, 0x036A, 0x036B, 0x036C, 0x036D, 0x036E, 0x036F,
    0x0483, 0x0484, 0x0485, 0x0486, 0x0487, 0x0592, 0x0593, 0x0594, 0x0595, 0x0597,
    0x0598, 0x0599, 0x059C, 0x059D, 0x059E, 0x059F, 0x05A0, 0x05A1, 0x05A8, 0x05A9,
    0x05AB, 0x05AC, 0x05AF, 0x05C4, 0x0610, 0x0611, 0x0612, 0x0613, 0x0614, 0x0615,
    0x0616, 0x0617, 0x0657, 0x0658, 0x0659, 0x065A, 0x065B, 0x065D, 0x065E, 0x06D6,
    0x06D7, 0x06D8, 0x06D9, 0x06DA, 0x06DB, 0x06DC, 0x06DF, 0x06E0, 0x06E1, 0x06E2,
    0x06E4, 0x06E7, 0x06E8, 0x06EB, 0x06EC, 0x0730, 0x0732, 0x0733, 0x0735, 0x0736,
    0x073A, 0x073D, 0x073F, 0x0740, 0x0741, 0x0743, 0x0745, 0x0747, 0x0749, 0x074A,
    0x07EB, 0x07EC, 0x07ED, 0x07EE, 0x07EF, 0x07F0, 0x07F1, 0x07F3, 0x0816, 0x0817,
    0x0818, 0x0819, 0x081B, 0x081C, 0x081D, 0x081E, 0x081F, 0x0820, 0x0821, 0x0822,
    0x0823, 0x0825, 0x0826, 0x0827, 0x0829, 0x082A, 0x082B, 0x082C,
))

#: Most rows or columns of cells a placed picture may cover (one mark per number).
MAX_CELLS = len(DIACRITICS)

#: Largest image id a 24-bit placeholder colour can name.
MAX_IMAGE_ID = 0xFFFFFF

#: Largest payload of one escape sequence, in bytes of base64.
CHUNK_BYTES = 4096


def kitty_transmit(
    rgb: np.ndarray,
    *,
    image_id: int,
    cols: int,
    rows: int,
    compress: bool = True,
    chunk: int = CHUNK_BYTES,
) -> str:
    """Escape sequences that send ``rgb`` and place it virtually over ``cols`` x ``rows`` cells.

    Parameters
    ----------
    rgb : ndarray, shape (H, W, 3), uint8
        The picture, row by row.
    image_id : int
        1..16777215 (the placeholders name it as a 24-bit colour). Sending a picture
        under an id in use replaces that picture.
    cols, rows : int
        Cells the picture covers, 1..:data:`MAX_CELLS` each.
    compress : bool
        Deflate the pixels with zlib (``o=z``) before base64.
    chunk : int
        Payload bytes per escape sequence, a positive multiple of 4 (the protocol's 4096).

    Returns
    -------
    str
        ``ESC _ G a=T,U=1,f=24,s=W,v=H,i=ID,c=C,r=R,q=2[,o=z][,m=1] ; payload ESC \\``
        followed by ``ESC _ G m=1 ; payload ESC \\`` ... ``ESC _ G m=0 ; payload ESC \\``
        when the payload is longer than ``chunk``.

    Raises
    ------
    ValueError
        If ``rgb`` is not (H, W, 3) uint8, or an id, size or chunk is out of range.
    """
    img = np.asarray(rgb)
    if img.dtype != np.uint8 or img.ndim != 3 or img.shape[2] != 3 or 0 in img.shape:
        raise ValueError(
            f"rgb: expected a non-empty uint8 (H, W, 3) array, got dtype {img.dtype} "
            f"shape {img.shape}"
        )
    if not 1 <= int(image_id) <= MAX_IMAGE_ID:
        raise ValueError(
            f"image_id: expected 1..{MAX_IMAGE_ID} (a 24-bit colour), got {image_id}"
        )
    if not (1 <= cols <= MAX_CELLS and 1 <= rows <= MAX_CELLS):
        raise ValueError(
            f"cols, rows: expected 1..{MAX_CELLS} cells each, got cols={cols} rows={rows}"
        )
    if chunk < 4 or chunk % 4:
        raise ValueError(f"chunk: expected a positive multiple of 4 bytes, got {chunk}")
    h, w = img.shape[:2]
    data = np.ascontiguousarray(img).tobytes()
    keys = f"a=T,U=1,f=24,s={w},v={h},i={int(image_id)},c={cols},r={rows},q=2"
    if compress:
        data = zlib.compress(data)
        keys += ",o=z"
    payload = base64.standard_b64encode(data).decode("ascii")
    parts = [payload[k : k + chunk] for k in range(0, len(payload), chunk)]
    if len(parts) == 1:
        return f"\x1b_G{keys};{payload}\x1b\\"
    out = []
    for n, part in enumerate(parts):
        more = int(n < len(parts) - 1)
        head = f"{keys},m={more}" if n == 0 else f"m={more}"
        out.append(f"\x1b_G{head};{part}\x1b\\")
    return "".join(out)


def placeholder_cell(row: int, col: int) -> str:
    """The text of the placeholder cell at ``row``, ``col`` of a placed picture.

    Parameters
    ----------
    row, col : int
        0..:data:`MAX_CELLS` - 1.

    Returns
    -------
    str
        U+10EEEE, the row's mark, the column's mark (one terminal cell wide).

    Raises
    ------
    ValueError
        If ``row`` or ``col`` has no mark.
    """
    if not (0 <= row < MAX_CELLS and 0 <= col < MAX_CELLS):
        raise ValueError(
            f"row, col: expected 0..{MAX_CELLS - 1} each, got row={row} col={col}"
        )
    return PLACEHOLDER + DIACRITICS[row] + DIACRITICS[col]


def id_colour(image_id: int) -> tuple[int, int, int]:
    """The 24-bit foreground colour ``(r, g, b)`` that names ``image_id`` in placeholders.

    Parameters
    ----------
    image_id : int
        1..:data:`MAX_IMAGE_ID`.

    Returns
    -------
    (int, int, int)
        ``(id >> 16, (id >> 8) & 255, id & 255)``.
    """
    i = int(image_id)
    if not 1 <= i <= MAX_IMAGE_ID:
        raise ValueError(f"image_id: expected 1..{MAX_IMAGE_ID}, got {image_id}")
    return (i >> 16) & 255, (i >> 8) & 255, i & 255
