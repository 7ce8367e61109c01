"""Where the interactive protocol acts next: the interior point of the largest error region.

The interactive segmentation protocol of Xu et al. (2016, "Deep Interactive Object
Selection", CVPR), as in its common reference implementations, places each simulated
click at the interior point of the largest region the current mask gets wrong. For
masks of several classes:

* the error regions are the 4-connected sets of wrongly labelled pixels of one target
  class (255 in the target is never an error);
* the largest region by pixel count is taken (ties: the one whose first pixel comes
  first in row-major order);
* its interior point is the maximum of its Euclidean distance transform
  (``scipy.ndimage.distance_transform_edt``), the tile border counting as outside (the
  region is padded with outside pixels, as the reference implementations do), ties:
  first in row-major order;
* the action there uses the target class at that point.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from scipy import ndimage as ndi

from labeler.classes import UNLABELLED

__all__ = ["ErrorClick", "next_click"]

_FOUR = ndi.generate_binary_structure(2, 1)


@dataclass(frozen=True)
class ErrorClick:
    """Where the protocol acts next.

    Attributes
    ----------
    point : (int, int)
        ``(row, col)`` interior point of the largest error region.
    cls : int
        Target class at the point.
    depth_px : float
        Distance transform value there (distance to the nearest pixel outside the
        region, the tile border counting as outside), at least 1.
    region : ndarray, shape (H, W), bool
        The error region.
    """

    point: tuple[int, int]
    cls: int
    depth_px: float
    region: np.ndarray = field(repr=False)


def next_click(target: np.ndarray, mask: np.ndarray) -> ErrorClick | None:
    """The interior point of the largest error region (see the module notes).

    Parameters
    ----------
    target : ndarray, shape (H, W), uint8
        The mask aimed at; 255 pixels are never errors.
    mask : ndarray, shape (H, W), uint8
        The current mask.

    Returns
    -------
    ErrorClick or None
        None when the mask equals the target wherever the target is labelled.
    """
    t = np.asarray(target)
    m = np.asarray(mask)
    if t.ndim != 2 or t.shape != m.shape:
        raise ValueError(
            f"mask: expected a 2-D mask of the target's shape {t.shape}, got shape {m.shape}"
        )
    error = (m != t) & (t != UNLABELLED)
    if not error.any():
        return None
    regions = np.zeros(t.shape, np.int64)
    n = 0
    for cls in np.unique(t[error]):
        lab, k = ndi.label(error & (t == cls), structure=_FOUR)
        regions[lab > 0] = lab[lab > 0] + n
        n += k
    sizes = np.bincount(regions.ravel(), minlength=n + 1)[1:]
    flat = np.arange(regions.size).reshape(regions.shape)
    first = np.asarray(ndi.minimum(flat, regions, np.arange(1, n + 1)), np.int64)
    best = int(np.lexsort((first, -sizes))[0]) + 1
    region = regions == best
    rows = np.flatnonzero(region.any(axis=1))
    cols = np.flatnonzero(region.any(axis=0))
    r0, c0 = int(rows[0]), int(cols[0])
    crop = region[r0 : int(rows[-1]) + 1, c0 : int(cols[-1]) + 1]
    # the tile border counts as outside: pad with False before the distance transform
    depth = ndi.distance_transform_edt(np.pad(crop, 1))[1:-1, 1:-1]
    i, j = np.unravel_index(int(depth.argmax()), depth.shape)
    point = (r0 + int(i), c0 + int(j))
    return ErrorClick(point, int(t[point]), float(depth[i, j]), region)
