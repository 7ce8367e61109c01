"""The tiles of one side of the simulation (pool or held-out set): truth, pixels, features."""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np

__all__ = ["TileSet"]


@dataclass
class TileSet:
    """Tiles with their truth and cached features, one entry per tile in each list.

    Attributes
    ----------
    keys : list of str
        Unique tile names (``<dataset>/<image>/<row>,<col>,<h>,<w>``).
    features : list of tuple of 4 ndarray
        Encoder features per tile, shapes ``(C_i, ceil(H / s_i), ceil(W / s_i))`` for the
        strides 4, 8, 16, 32 (float16 from the cache).
    masks : list of ndarray, each (H, W) uint8
        Truth: class indices of the schema.
    images : list of ndarray, each (H, W, 3) uint8
        The tiles' pixels.
    shapes : list of (int, int)
        ``(H, W)`` of each tile (derived from the masks).

    Raises
    ------
    ValueError
        Lists of different lengths, or duplicate keys.
    """

    keys: list[str]
    features: list[tuple[np.ndarray, ...]]
    masks: list[np.ndarray]
    images: list[np.ndarray]
    shapes: list[tuple[int, int]] = field(init=False)

    def __post_init__(self) -> None:
        n = len(self.keys)
        for name in ("features", "masks", "images"):
            if len(getattr(self, name)) != n:
                raise ValueError(
                    f"{name}: expected one entry per key ({n}), got {len(getattr(self, name))}"
                )
        if len(set(self.keys)) != n:
            raise ValueError("keys: expected unique tile keys, got duplicates")
        self.shapes = [tuple(int(v) for v in np.shape(m)[:2]) for m in self.masks]

    def __len__(self) -> int:
        return len(self.keys)

    def subset(self, rows: Sequence[int]) -> TileSet:
        """The tiles of ``rows``, in that order."""
        rows = [int(r) for r in rows]
        return TileSet(
            [self.keys[r] for r in rows],
            [self.features[r] for r in rows],
            [self.masks[r] for r in rows],
            [self.images[r] for r in rows],
        )
