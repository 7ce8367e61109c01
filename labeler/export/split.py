"""The train/validation split of exported tiles: spatial blocks, trimmed where sides meet.

Tiles of one image overlap their neighbours (the ``[tiles] overlap`` strip), and
neighbouring ground looks alike, so splitting tile by tile would put nearly the same
pixels on both sides and make validation scores look better than they are. The split
is therefore drawn per spatial block (Roberts et al. 2017, "Cross-validation strategies
for data with temporal, spatial, hierarchical, or phylogenetic structure", Ecography
40:913-929, recommend blocks for spatially structured data):

1. An image is cut into square blocks of ``block_px`` pixels (by default 4 tiles of
   the project's tile size a side). A tile belongs to the block holding its top-left
   pixel, so every tile of a block, and the overlap strips between them, are on one
   side.
2. Each block draws its side from its own content and position only:
   ``u = first 8 bytes of sha256("labeler-split:<seed>:<image sha256>:<block row>:<block col>") / 2**64``
   and the block is ``val`` when ``u < val_share``. Adding images or tiles never moves
   a block to the other side; a renamed copy of an image keeps its sides.
3. Where a validation tile overlaps a training tile of the next block (the overlap
   strip at a block border), the validation tile's usable window is cut back on the
   side that loses the fewest pixels until it shares no pixel with any training tile
   (:func:`trim_window`). The manifest row gives that window; a validation tile with
   nothing left is left out. So no pixel is both trained on and validated on.

Small images have few blocks: an image of one block is wholly train or wholly val.
"""

from __future__ import annotations

import hashlib
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from labeler.imagery.tiling import Window

__all__ = [
    "SPLITS",
    "TileSplit",
    "block_of",
    "split_for",
    "trim_window",
    "split_tiles",
]

SPLITS = ("train", "val")
_HEX = frozenset("0123456789abcdef")


def check_sha(sha: str, name: str = "image_sha256") -> str:
    """``sha`` in lower case when it is 64 hexadecimal digits, else a ValueError."""
    text = sha.lower() if isinstance(sha, str) else ""
    if len(text) != 64 or not set(text) <= _HEX:
        raise ValueError(
            f"{name}: expected 64 hexadecimal digits (a SHA-256), got {sha!r}; "
            "compute it with labeler.fileio.sha256_file(path)"
        )
    return text


@dataclass(frozen=True)
class TileSplit:
    """The side of one tile.

    Attributes
    ----------
    split : {"train", "val"}
    block : (int, int)
        Block row and column.
    window : Window or None
        The part of the tile to train or validate on: the whole tile on the train side,
        cut back where it overlaps training tiles on the val side; None when nothing is
        left.
    """

    split: str
    block: tuple[int, int]
    window: Window | None


def block_of(window: Window, *, block_px: int) -> tuple[int, int]:
    """The block ``(row, col)`` holding the top-left pixel of ``window``."""
    if not isinstance(block_px, int | np.integer) or block_px < 1:
        raise ValueError(f"block_px: expected a whole number of pixels >= 1, got {block_px!r}")
    return int(window.row) // int(block_px), int(window.col) // int(block_px)


def split_for(
    image_sha256: str,
    *,
    block: tuple[int, int] = (0, 0),
    seed: int = 0,
    val_share: float = 0.2,
) -> str:
    """``"train"`` or ``"val"`` for one block of an image, by the seeded rule above.

    Parameters
    ----------
    image_sha256 : str
        SHA-256 hex digest of the image file.
    block : (int, int)
        Block row and column (:func:`block_of`).
    seed : int
        Changes the draw for every block at once.
    val_share : float
        Expected share of validation blocks, 0..1.
    """
    sha = check_sha(image_sha256)
    if not 0.0 <= val_share <= 1.0:
        raise ValueError(f"val_share: expected a share in [0, 1], got {val_share}")
    if not isinstance(seed, int | np.integer) or isinstance(seed, bool):
        raise ValueError(f"seed: expected an integer, got {seed!r}")
    br, bc = (int(v) for v in block)
    key = f"labeler-split:{int(seed)}:{sha}:{br}:{bc}"
    digest = hashlib.sha256(key.encode("ascii")).digest()
    u = int.from_bytes(digest[:8], "big") / 2.0**64
    return "val" if u < val_share else "train"


def trim_window(window: Window, others: Sequence[Window]) -> Window | None:
    """Cut ``window`` back on its sides until it shares no pixel with any of ``others``.

    Each overlapping window is removed by moving one side of ``window`` past it: the
    side that keeps the most pixels (ties: top, bottom, left, right in that order).
    The result is a rectangle, so a tile is still read as one window.

    Parameters
    ----------
    window : Window
    others : sequence of Window

    Returns
    -------
    Window or None
        The cut-back window, or None when nothing is left.
    """
    r0, c0 = window.row, window.col
    r1, c1 = r0 + window.height, c0 + window.width
    for o in others:
        o0, p0 = o.row, o.col
        o1, p1 = o0 + o.height, p0 + o.width
        i0, i1 = max(r0, o0), min(r1, o1)
        j0, j1 = max(c0, p0), min(c1, p1)
        if i0 >= i1 or j0 >= j1:
            continue
        choices = [
            (i1, r1, c0, c1),  # top moves down past the overlap
            (r0, i0, c0, c1),  # bottom moves up
            (r0, r1, j1, c1),  # left moves right
            (r0, r1, c0, j0),  # right moves left
        ]
        areas = [max(0, b - a) * max(0, d - c) for a, b, c, d in choices]
        r0, r1, c0, c1 = choices[int(np.argmax(areas))]
        if r1 <= r0 or c1 <= c0:
            return None
    return Window(r0, c0, r1 - r0, c1 - c0)


def split_tiles(
    windows: Sequence[Window],
    *,
    image_sha256: str,
    block_px: int,
    seed: int = 0,
    val_share: float = 0.2,
) -> list[TileSplit]:
    """The side and usable window of every exported tile of one image.

    Parameters
    ----------
    windows : sequence of Window
        The exported tiles of the image.
    image_sha256 : str
    block_px : int
        Side of a block in pixels.
    seed, val_share
        The rule of :func:`split_for`.

    Returns
    -------
    list of TileSplit
        One per window, in order.
    """
    blocks = [block_of(w, block_px=block_px) for w in windows]
    sides = {
        b: split_for(image_sha256, block=b, seed=seed, val_share=val_share) for b in set(blocks)
    }
    train = [w for w, b in zip(windows, blocks, strict=True) if sides[b] == "train"]
    box = np.array([w.as_tuple() for w in train], np.int64).reshape(len(train), 4)
    out = []
    for w, b in zip(windows, blocks, strict=True):
        if sides[b] == "train":
            out.append(TileSplit("train", b, w))
            continue
        near = np.flatnonzero(  # only the training tiles that reach into this one
            (box[:, 0] < w.row + w.height) & (box[:, 0] + box[:, 2] > w.row)
            & (box[:, 1] < w.col + w.width) & (box[:, 1] + box[:, 3] > w.col)
        )
        out.append(TileSplit("val", b, trim_window(w, [train[k] for k in near])))
    return out
