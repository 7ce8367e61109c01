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

The strokes a person draws there (:mod:`labeler.demo.protocol` chooses among them):
:func:`stroke_line` along the error region's long axis, :func:`traced_line` along its
middle (a thin sliver along a plant's edge is traced, not crossed), each kept inside the
target class, and :func:`footprint`, what the editor's brush paints along them.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from scipy import ndimage as ndi
from skimage.morphology import skeletonize

from labeler.classes import UNLABELLED
from labeler.masks.edits import stroke_patch

__all__ = ["ErrorClick", "next_click", "stroke_line", "traced_line", "footprint", "BRUSH_RADII"]

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


def _axis(region: np.ndarray) -> np.ndarray:
    """Unit ``(row, col)`` direction of the region's long axis (principal component)."""
    coords = np.argwhere(region).astype(np.float64)
    if len(coords) < 2:
        return np.array([0.0, 1.0])
    cov = np.cov(coords.T)
    _, vectors = np.linalg.eigh(cov)
    return vectors[:, -1]


def stroke_line(
    allowed: np.ndarray, click: ErrorClick, *, radius: float, length: float
) -> list[tuple[float, float]]:
    """Samples of a stroke through the click along the region's axis.

    From the interior point the stroke extends one pixel at a time in both directions
    while the footprint of the new segment (:func:`labeler.masks.edits.stroke_patch`,
    what the editor paints) stays inside ``allowed``; at most ``length / 2`` each way.
    """
    shape = allowed.shape
    direction = _axis(click.region)
    start = (float(click.point[0]), float(click.point[1]))
    sides: list[list[tuple[float, float]]] = []
    for sign in (-1.0, 1.0):
        side: list[tuple[float, float]] = []
        last = start
        for step in range(1, int(length // 2) + 1):
            q = np.rint(np.asarray(start) + sign * step * direction)
            p = (float(q[0]), float(q[1]))
            if p == last:
                continue
            if not (0 <= p[0] < shape[0] and 0 <= p[1] < shape[1]):
                break
            patch = stroke_patch([last, p], radius=radius, shape=shape)
            if not allowed[patch.slices][patch.mask].all():
                break
            side.append(p)
            last = p
        sides.append(side)
    return [*reversed(sides[0]), start, *sides[1]]


def traced_line(
    allowed: np.ndarray, click: ErrorClick, *, radius: float, length: float
) -> list[tuple[float, float]]:
    """Samples of a stroke traced along the middle of the error region.

    The walk starts at the skeleton pixel of the error region
    (``skimage.morphology.skeletonize``; a region one pixel deep is taken whole) nearest
    the interior point and follows unvisited skeleton pixels in both directions
    (4-neighbours before diagonal ones), as a person traces a thin sliver
    with the brush; it stops where the footprint of the next segment would leave
    ``allowed``, at a branch end, or after ``length / 2`` samples each way.
    """
    shape = allowed.shape
    # a region one pixel deep is its own middle (the skeleton would cut its corners)
    skeleton = click.region if click.depth_px <= 1 else skeletonize(click.region)
    if not skeleton.any():
        return [(float(click.point[0]), float(click.point[1]))]
    cells = np.argwhere(skeleton)
    near = cells[int(((cells - np.asarray(click.point)) ** 2).sum(axis=1).argmin())]
    start = (int(near[0]), int(near[1]))
    # the stroke's first dab must fit too; else start at the interior point itself
    dab = stroke_patch([start], radius=radius, shape=shape)
    if not allowed[dab.slices][dab.mask].all():
        start = (int(click.point[0]), int(click.point[1]))
    visited = {start}
    sides: list[list[tuple[float, float]]] = []
    for _ in range(2):
        side: list[tuple[float, float]] = []
        last = start
        for _ in range(int(length // 2)):
            step = None
            for dr, dc in ((0, 1), (1, 0), (0, -1), (-1, 0), (1, 1), (1, -1), (-1, 1), (-1, -1)):
                q = (last[0] + dr, last[1] + dc)
                if (0 <= q[0] < shape[0] and 0 <= q[1] < shape[1] and skeleton[q]
                        and q not in visited):
                    step = q
                    break
            if step is None:
                break
            patch = stroke_patch([last, step], radius=radius, shape=shape)
            if not allowed[patch.slices][patch.mask].all():
                break
            visited.add(step)
            side.append((float(step[0]), float(step[1])))
            last = step
        sides.append(side)
    first = (float(start[0]), float(start[1]))
    return [*reversed(sides[0]), first, *sides[1]]


def footprint(points: list[tuple[float, float]], radius: float,
              shape: tuple[int, int]) -> np.ndarray:
    """What a brush stroke through ``points`` paints.

    Parameters
    ----------
    points : list of (float, float)
        ``(row, col)`` samples of the stroke.
    radius : float
        Brush radius, at least 0.5 px.
    shape : (int, int)
        ``(H, W)`` of the tile.

    Returns
    -------
    painted : ndarray, shape (H, W), bool
        :func:`labeler.masks.edits.stroke_patch` on the whole tile.
    """
    return stroke_patch(points, radius=radius, shape=shape).full(shape)


#: Brush radii the annotator considers for a stroke (pixels), besides the interior depth.
BRUSH_RADII = (0.5, 1.0, 1.5, 2.5, 3.5)
