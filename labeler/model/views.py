"""Two views of a field tile with their geometry recorded, for self-supervised adaptation.

A view is a square crop of the tile, resized to ``size`` x ``size`` pixels, mirrored
left-right or not and turned by a number of quarter turns (a nadir image has no "up"),
then jittered in colour and blur. Because the crop, the resize and the turn are recorded
(:class:`ViewGeometry`), every view pixel maps back to a tile position, and
:func:`cell_pairs` says which feature cell of view A sees the same ground as which cell
of view B: the positives of the dense loss (:mod:`labeler.model.dense`).

Field-specific choices (each a parameter):

* **Scale jitter** stands for a change of flying height: the crop side is ``size * s``
  tile pixels with ``s`` log-uniform in ``scale_range`` (0.7 to 1.4 by default, i.e. the
  ground sampling distance of the view within -30 % and +40 % of the tile's; common
  practice, no source). Where the tile is too small for a coarse view, the crop is the
  largest square the tile holds.
* **Sun and shade**: brightness gain, contrast and saturation factors, a small hue shift
  (a few degrees: a larger one would turn green leaves brown and teach the encoder to
  ignore the colour that tells plant from soil), and a Gaussian blur (sigma 0.1 to 1.5
  with probability 0.5, after SimCLR's blur of sigma 0.1 to 2.0). SimCLR's grey-scale
  views are left out for the same reason as large hue shifts.
* **Never a crop of bare soil when the tile has plants**: where the tile holds at least
  ``min_plant_px`` vegetation pixels (ExG - ExR > 0, :func:`labeler.masks.vegetation.
  vegetation_mask`), each crop holds at least that many too (or the most any tried crop
  holds, in a pathological tile).
* **Overlap**: the two crops share at least ``min_overlap`` of the smaller crop's area, so
  the dense loss has cells to match.

A revisit (the same ground on another date, resampled onto the tile's pixel grid by the
caller) is passed as ``other``: view B is then cut from it, with the same geometry rules.

Coordinates are continuous ``(row, col)`` in the pixel-corner convention: pixel ``(r, c)``
covers ``[r, r + 1) x [c, c + 1)``, its centre is ``(r + 0.5, c + 0.5)``. A view is made
as crop -> resize -> left-right mirror -> ``turns`` quarter turns counter-clockwise
(``np.rot90``), in that order.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import cv2
import numpy as np

from labeler.masks.vegetation import vegetation_mask

__all__ = [
    "ViewGeometry",
    "ColourJitter",
    "ViewPair",
    "field_views",
    "cell_pairs",
    "apply_geometry",
    "jitter_colour",
    "default_view_size",
]

#: Candidate crop positions drawn per view before falling back.
_CANDIDATES = 48


@dataclass(frozen=True)
class ViewGeometry:
    """Where a view came from in its source tile.

    Attributes
    ----------
    row, col : int
        Top-left pixel of the square crop in the source tile.
    side : int
        Crop side in source pixels.
    size : int
        View side in view pixels (the crop is resized to it).
    flip : bool
        Mirrored left-right after the resize.
    turns : int
        Quarter turns counter-clockwise after the mirror (0..3).
    """

    row: int
    col: int
    side: int
    size: int
    flip: bool
    turns: int

    @property
    def scale(self) -> float:
        """Source pixels per view pixel (above 1: the view is coarser than the tile)."""
        return self.side / self.size

    def to_source(self, rows: np.ndarray, cols: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Source-tile coordinates of continuous view coordinates ``(rows, cols)``."""
        y = np.asarray(rows, np.float64)
        x = np.asarray(cols, np.float64)
        s = float(self.size)
        for _ in range(self.turns % 4):  # undo one np.rot90: view (y, x) <- (x, s - y)
            y, x = x, s - y
        if self.flip:
            x = s - x
        return self.row + y * self.scale, self.col + x * self.scale

    def from_source(self, rows: np.ndarray, cols: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Continuous view coordinates of source-tile coordinates ``(rows, cols)``."""
        y = (np.asarray(rows, np.float64) - self.row) / self.scale
        x = (np.asarray(cols, np.float64) - self.col) / self.scale
        s = float(self.size)
        if self.flip:
            x = s - x
        for _ in range(self.turns % 4):  # one np.rot90: (y, x) -> (s - x, y)
            y, x = s - x, y
        return y, x


@dataclass(frozen=True)
class ColourJitter:
    """Ranges of the photometric jitter (sun, shade, haze, focus).

    Attributes
    ----------
    brightness : float
        Gain drawn from ``[1 - brightness, 1 + brightness]``.
    contrast : float
        Contrast factor from ``[1 - contrast, 1 + contrast]`` (about the view's mean grey).
    saturation : float
        Saturation factor from ``[1 - saturation, 1 + saturation]``.
    hue : float
        Hue shift from ``[-hue, hue]`` in turns (0.03 = 10.8 degrees).
    blur_probability : float
        Chance of a Gaussian blur.
    blur_sigma : (float, float)
        Range of its sigma in view pixels.
    """

    brightness: float = 0.3
    contrast: float = 0.3
    saturation: float = 0.2
    hue: float = 0.03
    blur_probability: float = 0.5
    blur_sigma: tuple[float, float] = (0.1, 1.5)


@dataclass(frozen=True)
class ViewPair:
    """Two views of the same ground and how they were made.

    Attributes
    ----------
    a, b : ndarray, shape (size, size, 3), uint8
    geometry_a, geometry_b : ViewGeometry
    """

    a: np.ndarray
    b: np.ndarray
    geometry_a: ViewGeometry
    geometry_b: ViewGeometry

    def cell_pairs(self, stride: int) -> np.ndarray:
        """Matched feature cells at ``stride``; see :func:`cell_pairs`."""
        return cell_pairs(self.geometry_a, self.geometry_b, stride=stride)


def default_view_size(height: int, width: int) -> int:
    """Three quarters of the tile's shorter side, down to a multiple of 32, within 32..128.

    128 pixels for the usual 256-pixel tiles: the cost of a training step on a CPU grows
    with the square of the view side, and a view of 128 pixels at scales 0.7 to 1.4
    still spans a third to two thirds of such a tile.
    """
    return min(128, max(32, int(0.75 * min(height, width)) // 32 * 32))


def cell_pairs(geometry_a: ViewGeometry, geometry_b: ViewGeometry, *, stride: int) -> np.ndarray:
    """Which feature cell of view A sees the same ground as which cell of view B.

    The feature map of a view at ``stride`` has ``size // stride`` cells a side; cell
    ``(i, j)`` covers view pixels ``[i * stride, (i + 1) * stride)`` along each axis. Each
    cell of A is matched to the cell of B that contains the ground at A's cell centre;
    cells of A whose centre falls outside view B are left out.

    Parameters
    ----------
    geometry_a, geometry_b : ViewGeometry
        Of two views of the same source tile (or of aligned revisits).
    stride : int
        Feature stride in view pixels; must divide both view sizes.

    Returns
    -------
    pairs : ndarray, shape (M, 2), int64
        Rows ``(cell_a, cell_b)`` of flat indices ``row * cells_per_side + col``.

    Raises
    ------
    ValueError
        If ``stride`` does not divide a view size.
    """
    for name, g in (("geometry_a", geometry_a), ("geometry_b", geometry_b)):
        if stride < 1 or g.size % stride:
            raise ValueError(
                f"stride: expected a positive divisor of the view size, got {stride} for "
                f"{name}.size = {g.size}; make views whose size is a multiple of 32"
            )
    na, nb = geometry_a.size // stride, geometry_b.size // stride
    ii, jj = np.mgrid[:na, :na]
    centre_r = (ii.ravel() + 0.5) * stride
    centre_c = (jj.ravel() + 0.5) * stride
    src_r, src_c = geometry_a.to_source(centre_r, centre_c)
    yb, xb = geometry_b.from_source(src_r, src_c)
    rb = np.floor(yb / stride).astype(np.int64)
    cb = np.floor(xb / stride).astype(np.int64)
    inside = (yb >= 0) & (xb >= 0) & (rb < nb) & (cb < nb)
    cells_a = np.flatnonzero(inside).astype(np.int64)
    cells_b = rb[inside] * nb + cb[inside]
    return np.stack([cells_a, cells_b], axis=1)


def apply_geometry(source: np.ndarray, geometry: ViewGeometry) -> np.ndarray:
    """Cut, resize, mirror and turn ``source`` (H, W, ...) as ``geometry`` says."""
    g = geometry
    crop = source[g.row : g.row + g.side, g.col : g.col + g.side]
    if crop.shape[0] != g.side or crop.shape[1] != g.side:
        raise ValueError(
            f"geometry: the crop {g.side} px at ({g.row}, {g.col}) leaves the source of shape "
            f"{source.shape[:2]}"
        )
    if g.side != g.size:
        interp = cv2.INTER_AREA if g.side > g.size else cv2.INTER_LINEAR
        crop = cv2.resize(np.ascontiguousarray(crop), (g.size, g.size), interpolation=interp)
    if g.flip:
        crop = crop[:, ::-1]
    return np.ascontiguousarray(np.rot90(crop, g.turns % 4))


def jitter_colour(
    view: np.ndarray, jitter: ColourJitter, *, rng: np.random.Generator
) -> np.ndarray:
    """Random hue, saturation, brightness, contrast and blur of a uint8 RGB view."""
    out = view
    hue = rng.uniform(-jitter.hue, jitter.hue)
    sat = rng.uniform(1 - jitter.saturation, 1 + jitter.saturation)
    if hue != 0 or sat != 1:
        hsv = cv2.cvtColor(np.ascontiguousarray(out), cv2.COLOR_RGB2HSV_FULL).astype(np.float32)
        hsv[..., 0] = np.mod(hsv[..., 0] + hue * 256.0, 256.0)
        hsv[..., 1] = np.clip(hsv[..., 1] * sat, 0, 255)
        out = cv2.cvtColor(np.rint(hsv).clip(0, 255).astype(np.uint8), cv2.COLOR_HSV2RGB_FULL)
    f = out.astype(np.float32)
    gain = rng.uniform(1 - jitter.brightness, 1 + jitter.brightness)
    contrast = rng.uniform(1 - jitter.contrast, 1 + jitter.contrast)
    mean = float(f.mean())
    f = (f * gain - mean * gain) * contrast + mean * gain
    if rng.random() < jitter.blur_probability:
        sigma = rng.uniform(*jitter.blur_sigma)
        k = 2 * math.ceil(3 * sigma) + 1
        f = cv2.GaussianBlur(f, (k, k), sigma, borderType=cv2.BORDER_REFLECT)
    return np.rint(f).clip(0, 255).astype(np.uint8)


def _side_for(height: int, width: int, size: int, scale_range: tuple[float, float], rng) -> int:
    lo, hi = scale_range
    scale = math.exp(rng.uniform(math.log(lo), math.log(hi)))
    return int(min(max(round(size * scale), 1), height, width))


def _plant_counts(integral: np.ndarray, rows: np.ndarray, cols: np.ndarray, side: int):
    """Plant pixels in the squares ``[r, r + side) x [c, c + side)`` (summed-area table)."""
    r1, c1 = rows + side, cols + side
    return integral[r1, c1] - integral[rows, c1] - integral[r1, cols] + integral[rows, cols]


def _overlap_share(rows, cols, side, other: tuple[int, int, int]) -> np.ndarray:
    r0, c0, s0 = other
    dr = np.minimum(rows + side, r0 + s0) - np.maximum(rows, r0)
    dc = np.minimum(cols + side, c0 + s0) - np.maximum(cols, c0)
    inter = np.clip(dr, 0, None) * np.clip(dc, 0, None)
    return inter / float(min(side, s0) ** 2)


def _place(
    shape: tuple[int, int],
    side: int,
    *,
    rng: np.random.Generator,
    plants: np.ndarray,
    integral: np.ndarray,
    need_plants: int,
    partner: tuple[int, int, int] | None,
    min_overlap: float,
) -> tuple[int, int]:
    """Top-left of a crop that meets the plant and overlap rules (best effort)."""
    h, w = shape
    rows = rng.integers(0, h - side + 1, _CANDIDATES)
    cols = rng.integers(0, w - side + 1, _CANDIDATES)
    extra_r, extra_c = [], []
    if partner is not None:  # centred on the partner crop
        pr, pc, ps = partner
        extra_r.append(pr + ps // 2 - side // 2)
        extra_c.append(pc + ps // 2 - side // 2)
    if need_plants:  # centred on random plant pixels
        plant_px = np.argwhere(plants)
        pick = plant_px[rng.integers(0, len(plant_px), 8)]
        extra_r.extend(pick[:, 0] - side // 2)
        extra_c.extend(pick[:, 1] - side // 2)
    if extra_r:
        rows = np.concatenate([rows, np.clip(extra_r, 0, h - side)])
        cols = np.concatenate([cols, np.clip(extra_c, 0, w - side)])
    held = _plant_counts(integral, rows, cols, side)
    overlap = np.ones(len(rows)) if partner is None else _overlap_share(rows, cols, side, partner)
    ok_plants = held >= need_plants
    ok_overlap = overlap >= min_overlap
    # the first candidate meeting both rules; else prefer overlap, then the most plants
    both = (ok_plants & ok_overlap).astype(np.int64)
    order = np.lexsort((-np.minimum(held, need_plants), -ok_overlap.astype(np.int64), -both))
    best = int(order[0])
    return int(rows[best]), int(cols[best])


def field_views(
    tile: np.ndarray,
    *,
    rng: np.random.Generator,
    other: np.ndarray | None = None,
    plants: np.ndarray | None = None,
    plants_other: np.ndarray | None = None,
    size: int | None = None,
    scale_range: tuple[float, float] = (0.7, 1.4),
    min_overlap: float = 0.3,
    min_plant_px: int = 16,
    jitter: ColourJitter | None = ColourJitter(),
) -> ViewPair:
    """Two jittered views of a tile (or of a tile and its revisit) with their geometry.

    Parameters
    ----------
    tile : ndarray, shape (H, W, 3), uint8
        The source of view A (and of view B without ``other``).
    rng : numpy.random.Generator
        All random draws come from it.
    other : ndarray, shape (H, W, 3), uint8, optional
        The same ground on another date, on the tile's pixel grid: view B is cut from it.
    plants, plants_other : ndarray, shape (H, W), bool, optional
        Vegetation masks of ``tile`` and ``other``; computed with
        :func:`~labeler.masks.vegetation.vegetation_mask` when not given.
    size : int, optional
        View side in pixels, a multiple of 32; default :func:`default_view_size`.
    scale_range : (float, float)
        Range of source pixels per view pixel (log-uniform).
    min_overlap : float
        Least share of the smaller crop that the two crops must share, in [0, 1].
    min_plant_px : int
        A source with at least this many plant pixels gives crops with at least as many.
    jitter : ColourJitter or None
        Photometric jitter; None leaves the colours as resized.

    Returns
    -------
    ViewPair

    Raises
    ------
    ValueError
        For a tile that is not uint8 RGB, an ``other`` or mask of another shape, a
        ``size`` that is not a positive multiple of 32, or ranges out of order.
    """
    if tile.dtype != np.uint8 or tile.ndim != 3 or tile.shape[2] != 3:
        raise ValueError(
            f"tile: expected uint8 RGB of shape (H, W, 3), got {tile.dtype} {tile.shape}"
        )
    h, w = tile.shape[:2]
    if other is not None and (other.dtype != np.uint8 or other.shape != tile.shape):
        raise ValueError(
            f"other: expected uint8 of the tile's shape {tile.shape}, got {other.dtype} "
            f"{other.shape}; resample the revisit onto the tile's grid first"
        )
    for name, m in (("plants", plants), ("plants_other", plants_other)):
        if m is not None and m.shape != (h, w):
            raise ValueError(f"{name}: expected a mask of shape {(h, w)}, got {m.shape}")
    size = default_view_size(h, w) if size is None else int(size)
    if size < 32 or size % 32:
        raise ValueError(f"size: expected a positive multiple of 32, got {size}")
    lo, hi = scale_range
    if not 0 < lo <= hi:
        raise ValueError(f"scale_range: expected 0 < low <= high, got {scale_range}")
    if not 0 <= min_overlap <= 1:
        raise ValueError(f"min_overlap: expected a share in [0, 1], got {min_overlap}")
    sources = (tile, tile if other is None else other)
    masks = [plants, plants_other if other is not None else plants]
    geoms: list[ViewGeometry] = []
    for k in range(2):
        m = vegetation_mask(sources[k]) if masks[k] is None else np.asarray(masks[k], bool)
        integral = np.pad(np.cumsum(np.cumsum(m, 0, dtype=np.int64), 1), ((1, 0), (1, 0)))
        need = min_plant_px if integral[-1, -1] >= min_plant_px else 0
        side = _side_for(h, w, size, scale_range, rng)
        partner = None if k == 0 else (geoms[0].row, geoms[0].col, geoms[0].side)
        r, c = _place(
            (h, w),
            side,
            rng=rng,
            plants=m,
            integral=integral,
            need_plants=need,
            partner=partner,
            min_overlap=min_overlap,
        )
        geoms.append(
            ViewGeometry(
                r, c, side, size, flip=bool(rng.random() < 0.5), turns=int(rng.integers(4))
            )
        )
    views = [apply_geometry(src, g) for src, g in zip(sources, geoms, strict=True)]
    if jitter is not None:
        views = [jitter_colour(v, jitter, rng=rng) for v in views]
    return ViewPair(views[0], views[1], geoms[0], geoms[1])
