"""DEC sixel graphics: a picture as a palette and bands six pixels high.

Source: Digital Equipment Corporation, "VT330/VT340 Programmer Reference Manual, Volume 2:
Graphics Programming" (EK-VT3XX-GP), chapter 14 "Sixel Graphics" (the same rules are in
DEC STD 070). A sixel picture is a device control string::

    ESC P P1 ; P2 ; P3 q  "Pan;Pad;Ph;Pv  #Pc;Pu;Px;Py;Pz ...  data  ESC \\

``P2 = 1``: pixels left at 0 keep their colour on the screen; the raster attributes
``"1;1;W;H`` give square pixels and the picture size; ``#Pc;2;R;G;B`` defines colour
register ``Pc`` in RGB percentages (0..100). Data come in bands six pixel rows high:
for one colour, each column of the band is one character ``63 + bits`` (bit 0 the top
row); ``#Pc`` selects the colour, ``$`` returns to the band's start for the next
colour, ``-`` moves to the next band, ``!Pn c`` repeats character ``c`` ``Pn`` times.

:func:`median_cut` reduces a picture to at most 256 colours (Heckbert, "Color image
quantization for frame buffer display", SIGGRAPH 1982: split the box of colours with
the widest channel range at its median, weighting each colour by its pixel count).
Pure numpy; no terminal is queried.
"""

from __future__ import annotations

import numpy as np

__all__ = ["MAX_COLOURS", "median_cut", "sixel_percent", "sixel_encode", "sixel_picture"]

#: Colour registers a sixel picture uses at most (the usual 256 of current terminals).
MAX_COLOURS = 256


def _check_rgb(rgb: object) -> np.ndarray:
    img = np.asarray(rgb)
    if img.dtype != np.uint8 or img.ndim != 3 or img.shape[2] != 3 or 0 in img.shape:
        raise ValueError(
            f"rgb: expected a non-empty uint8 (H, W, 3) array, got dtype {img.dtype} "
            f"shape {img.shape}"
        )
    return img


def median_cut(rgb: np.ndarray, *, colours: int = MAX_COLOURS) -> tuple[np.ndarray, np.ndarray]:
    """A palette of at most ``colours`` colours for ``rgb`` and each pixel's entry.

    A picture with ``colours`` distinct colours or fewer keeps them exactly (palette in
    ascending order of ``(r, g, b)``). Otherwise the colours, cut to 5 bits a channel,
    are put in boxes that are split -- the box whose widest channel spans the most
    first, at the pixel-weighted median of that channel -- until there are ``colours``
    boxes; each box's entry is the mean of its pixels (full precision), rounded half
    up, and every pixel takes its box's entry.

    Parameters
    ----------
    rgb : ndarray, shape (H, W, 3), uint8
    colours : int
        Largest palette, 1..256.

    Returns
    -------
    palette : ndarray, shape (n, 3), uint8
        ``n <= colours``.
    index : ndarray, shape (H, W), int64
        Palette entry of each pixel.

    Raises
    ------
    ValueError
        If ``rgb`` is not (H, W, 3) uint8 or ``colours`` is out of range.
    """
    img = _check_rgb(rgb)
    if not 1 <= colours <= MAX_COLOURS:
        raise ValueError(f"colours: expected 1..{MAX_COLOURS}, got {colours}")
    h, w = img.shape[:2]
    flat = img.reshape(-1, 3)
    wide = flat.astype(np.int64)
    codes = (wide[:, 0] << 16) | (wide[:, 1] << 8) | wide[:, 2]  # ascending as (r, g, b)
    uniq_codes, inverse = np.unique(codes, return_inverse=True)
    if len(uniq_codes) <= colours:
        uniq = np.stack([uniq_codes >> 16, (uniq_codes >> 8) & 255, uniq_codes & 255], 1)
        return uniq.astype(np.uint8), inverse.reshape(h, w).astype(np.int64)
    # boxes are cut over colours of 5 bits a channel (at most 32768 of them); the entries
    # are the means of the full-precision pixels of each box
    coarse = wide >> 3
    coarse_codes = (coarse[:, 0] << 10) | (coarse[:, 1] << 5) | coarse[:, 2]
    counts = np.bincount(coarse_codes, minlength=1 << 15)
    present = np.flatnonzero(counts)
    position = np.zeros(1 << 15, np.int64)
    position[present] = np.arange(len(present))
    inverse = position[coarse_codes]
    counts = counts[present]
    uniq = np.stack([present >> 10, (present >> 5) & 31, present & 31], 1)
    boxes = [np.arange(len(uniq))]
    spans = [np.ptp(uniq, axis=0)]
    while len(boxes) < colours:
        k = int(np.argmax([int(sp.max()) for sp in spans]))
        if int(spans[k].max()) == 0:
            break  # every box holds one colour
        box, channel = boxes[k], int(np.argmax(spans[k]))
        order = box[np.argsort(uniq[box, channel], kind="stable")]
        cum = np.cumsum(counts[order])
        cut = int(np.searchsorted(cum, cum[-1] / 2.0)) + 1
        cut = min(max(cut, 1), len(order) - 1)
        halves = [order[:cut], order[cut:]]
        boxes[k : k + 1] = halves
        spans[k : k + 1] = [np.ptp(uniq[half], axis=0) for half in halves]
    box_of = np.empty(len(uniq), np.int64)
    for n, b in enumerate(boxes):
        box_of[b] = n
    index = box_of[inverse]
    total = np.bincount(index, minlength=len(boxes))
    palette = np.empty((len(boxes), 3), np.uint8)
    for c in range(3):
        sums = np.bincount(index, weights=flat[:, c].astype(np.float64), minlength=len(boxes))
        sums = np.rint(sums).astype(np.int64)  # whole numbers, exact below 2**53
        palette[:, c] = (2 * sums + total) // (2 * total)
    return palette, index.reshape(h, w)


def sixel_percent(value: int) -> int:
    """An 8-bit channel value as the sixel colour's percentage, rounded half up.

    Parameters
    ----------
    value : int
        0..255.

    Returns
    -------
    int
        ``round_half_up(value * 100 / 255)``, 0..100.
    """
    return (int(value) * 200 + 255) // 510


def _run_length_rows(chars: np.ndarray, lengths: np.ndarray) -> list[str]:
    """Rows of sixel characters, each cut to its length, with runs of four or more equal
    characters written ``!<n><c>`` (vectorised over all rows at once).

    Parameters
    ----------
    chars : ndarray, shape (m, w), int64
        Sixel characters (63..126) of ``m`` rows.
    lengths : ndarray, shape (m,), int64
        Characters kept of each row, 1..w.

    Returns
    -------
    list of str
        The ``m`` encoded rows.
    """
    m, w = chars.shape
    seq = chars[np.arange(w)[None, :] < lengths[:, None]]  # the rows, one after the other
    row_of = np.repeat(np.arange(m), lengths)
    n = len(seq)
    new_run = np.ones(n, bool)
    new_run[1:] = (seq[1:] != seq[:-1]) | (row_of[1:] != row_of[:-1])
    starts = np.flatnonzero(new_run)
    run = np.diff(np.append(starts, n))
    ch = seq[starts]
    long = run >= 4
    digits = np.ones(len(run), np.int64)  # decimal digits of each run's count
    for k in range(1, len(str(w))):
        digits += run >= 10**k
    size = np.where(long, digits + 2, run)  # "!", the digits, the character
    at = np.concatenate([[0], np.cumsum(size)])
    buf = np.empty(int(at[-1]), np.uint8)
    short = ~long
    if short.any():  # each short run written out: its character ``run`` times
        r = run[short]
        first = np.repeat(at[:-1][short], r)
        within = np.arange(int(r.sum())) - np.repeat(np.cumsum(r) - r, r)
        buf[first + within] = np.repeat(ch[short], r)
    if long.any():
        o, r, d = at[:-1][long], run[long], digits[long]
        buf[o] = ord("!")
        for k in range(int(d.max())):  # the k-th digit of each count that has one
            has = k < d
            buf[o[has] + 1 + k] = 48 + (r[has] // 10 ** (d[has] - 1 - k)) % 10
        buf[o + 1 + d] = ch[long]
    text = buf.tobytes().decode("ascii")
    row_start = at[np.searchsorted(starts, np.concatenate([[0], np.cumsum(lengths)[:-1]]))]
    row_end = np.append(row_start[1:], len(text))
    return [text[a:b] for a, b in zip(row_start.tolist(), row_end.tolist(), strict=True)]


def sixel_encode(index: np.ndarray, palette: np.ndarray) -> str:
    """The device control string that draws a palette picture as sixels.

    Colour registers are the palette entries' numbers; only the entries the picture
    uses are defined. In each band the colours come in ascending register order,
    separated by ``$``; each colour's characters stop at its last set pixel; bands are
    separated by ``-``. Runs of four or more equal characters are written ``!<n><c>``.

    Parameters
    ----------
    index : ndarray, shape (H, W), integer
        Palette entry of each pixel, 0..n-1.
    palette : ndarray, shape (n, 3), uint8
        The colours, n <= 256.

    Returns
    -------
    str
        ``ESC P 0;1;0 q "1;1;W;H #c;2;r;g;b ... <bands> ESC \\``.

    Raises
    ------
    ValueError
        If the shapes or entries do not fit.
    """
    idx = np.asarray(index)
    pal = np.asarray(palette)
    if idx.ndim != 2 or 0 in idx.shape or not np.issubdtype(idx.dtype, np.integer):
        raise ValueError(f"index: expected a non-empty (H, W) integer array, got {idx.shape}")
    if pal.ndim != 2 or pal.shape[1] != 3 or not 1 <= len(pal) <= MAX_COLOURS:
        raise ValueError(f"palette: expected (n, 3) colours, 1 <= n <= 256, got {pal.shape}")
    if idx.min() < 0 or idx.max() >= len(pal):
        raise ValueError(
            f"index: expected entries 0..{len(pal) - 1} of the palette, got "
            f"{int(idx.min())}..{int(idx.max())}"
        )
    h, w = idx.shape
    parts = ["\x1bP0;1;0q", f'"1;1;{w};{h}']
    for c in np.unique(idx):
        r, g, b = (sixel_percent(v) for v in pal[c])
        parts.append(f"#{int(c)};2;{r};{g};{b}")
    n_colours = len(pal)
    for top in range(0, h, 6):
        band = idx[top : top + 6].astype(np.int64)
        # bits[c, x]: the rows of column x in colour c, bit 0 the band's top row
        key = (band * w + np.arange(w)).ravel()
        weight = np.repeat(1 << np.arange(len(band)), w)
        bits = np.bincount(key, weights=weight, minlength=n_colours * w)
        bits = bits.astype(np.int64).reshape(n_colours, w)
        used = np.flatnonzero(bits.any(axis=1))
        rows = bits[used]
        # each colour's characters stop at its last set pixel
        lengths = w - np.argmax(rows[:, ::-1] != 0, axis=1)
        encoded = _run_length_rows(rows + 63, lengths)
        parts.append("$".join(f"#{int(c)}{e}" for c, e in zip(used.tolist(), encoded,
                                                               strict=True)))
        if top + 6 < h:
            parts.append("-")
    parts.append("\x1b\\")
    return "".join(parts)


def sixel_picture(rgb: np.ndarray, *, colours: int = MAX_COLOURS) -> str:
    """:func:`median_cut` then :func:`sixel_encode`: an RGB picture as sixels.

    Parameters
    ----------
    rgb : ndarray, shape (H, W, 3), uint8
    colours : int
        Largest palette, 1..256.

    Returns
    -------
    str
        The device control string.
    """
    palette, index = median_cut(rgb, colours=colours)
    return sixel_encode(index, palette)
