"""Weak labels to full masks: random walker from marked pixels, superpixel snapping, GrabCut.

Pure array work (numpy, scipy, scikit-image; OpenCV only for the GrabCut maths). Masks are
``(H, W)`` uint8 class indices; a weak label holds a class index on marked pixels and
255 (:data:`labeler.classes.UNLABELLED`) elsewhere. Images are ``(H, W, 3)`` uint8 RGB.

Refinement is local: only a band of ``band_px`` pixels around the weak label's marks is
decided again; outside it the mask is kept, and the band's outer rim acts as seeds carrying the
current mask's classes, so the new boundary joins the old mask smoothly.

Refinement stops at the plant/soil split and at strong colour edges: the band is cut into
colour regions that never cross the vegetation/soil split
(:func:`labeler.masks.colour_regions.split_regions`, vegetation by ExG - ExR), and a pixel
may only take a class whose seeds (marks or rim) lie in its own region. The band takes in
the whole vegetation region under a mark (a scribble in a plant's core decides the plant),
except the pixels at the split that look like soil
(:func:`labeler.masks.vegetation.sharpen_split`), which keep the current mask. A region
seeded with one class takes it, a region seeded with several lets the random walker
choose among them, and a region with no seed keeps the current mask. So one weed scribble stroke on a plant labels the plant and
never the soil beyond its edge, whether or not the result is snapped to superpixels.
"""

from __future__ import annotations

import warnings

import cv2
import numpy as np
from scipy import ndimage as ndi
from skimage.segmentation import random_walker, slic

from labeler.classes import UNLABELLED
from labeler.masks.colour_regions import (
    DEFAULT_EDGE_SIGMA,
    DEFAULT_EDGE_THRESHOLD,
    DEFAULT_PLANT_EDGE_THRESHOLD,
    split_regions,
)
from labeler.masks.edits import region_bounds
from labeler.masks.vegetation import sharpen_split, vegetation_mask

__all__ = [
    "weak_label_band",
    "refine_random_walker",
    "snap_to_superpixels",
    "grabcut_box",
]

#: Largest number of undecided pixels solved directly ('bf'); larger systems use 'cg_j'.
DIRECT_SOLVE_MAX = 100_000


def _check_image(image: np.ndarray) -> np.ndarray:
    a = np.asarray(image)
    if a.ndim != 3 or a.shape[2] != 3 or a.dtype != np.uint8 or a.shape[0] < 1 or a.shape[1] < 1:
        raise ValueError(
            f"image: expected a (H, W, 3) uint8 RGB tile, got shape {a.shape} dtype {a.dtype}"
        )
    return a


def _check_like(arr: np.ndarray, image: np.ndarray, name: str) -> np.ndarray:
    a = np.asarray(arr)
    if a.shape != image.shape[:2] or a.dtype != np.uint8:
        raise ValueError(
            f"{name}: expected a uint8 array of shape {image.shape[:2]} like image, got shape "
            f"{a.shape} dtype {a.dtype}; pass the mask of the same tile"
        )
    return a


def weak_label_band(weak_label: np.ndarray, *, band_px: float) -> np.ndarray:
    """Pixels within ``band_px`` (Euclidean) of a marked pixel, marks included.

    Parameters
    ----------
    weak_label : ndarray, shape (H, W), uint8
        Class index on marked pixels, 255 elsewhere.
    band_px : float
        Band half-width in pixels, at least 0.

    Returns
    -------
    band : ndarray, shape (H, W), bool
        All False when nothing is marked.
    """
    s = np.asarray(weak_label)
    if s.ndim != 2:
        raise ValueError(f"weak_label: expected a 2-D array, got shape {s.shape}")
    if not np.isfinite(band_px) or band_px < 0:
        raise ValueError(f"band_px: expected a width of at least 0 pixels, got {band_px}")
    have = s != UNLABELLED
    if not have.any():
        return np.zeros(s.shape, bool)
    return ndi.distance_transform_edt(~have) <= band_px


def refine_random_walker(
    image: np.ndarray,
    mask: np.ndarray,
    weak_label: np.ndarray,
    *,
    band_px: float = 24.0,
    beta: float = 130.0,
    mode: str = "auto",
    snap: bool = False,
    n_segments: int = 400,
    compactness: float = 10.0,
    edge_threshold: float | None = DEFAULT_EDGE_THRESHOLD,
    plant_edge_threshold: float = DEFAULT_PLANT_EDGE_THRESHOLD,
    edge_sigma: float = DEFAULT_EDGE_SIGMA,
    vegetation: np.ndarray | None = None,
    grow_max_share: float = 0.25,
) -> np.ndarray:
    """Turn a weak label plus the current mask into a full mask by random walker.

    Inside the band around the marks every pixel is decided again by the random
    walker of Grady (2006), ``skimage.segmentation.random_walker(data, labels,
    beta=beta, mode=..., channel_axis=-1)``: marked pixels are seeds of their class,
    the rim just outside the band is seeded with the current mask, and the remaining band
    pixels are unknown. Each band pixel then takes, among the classes seeded in its colour
    region (see the module notes), the one the walker finds most probable; a region
    without seeds keeps the current mask. Outside the band the mask is returned
    unchanged; marked pixels always end with their marked class.

    Parameters
    ----------
    image : ndarray, shape (H, W, 3), uint8
        The RGB tile.
    mask : ndarray, shape (H, W), uint8
        Current class mask (the proposal or the edited mask). Rim pixels of value 255
        carry no seed.
    weak_label : ndarray, shape (H, W), uint8
        Class index on marked pixels, 255 elsewhere.
    band_px : float
        Half-width of the band that is decided again.
    beta : float
        Edge penalty of the random walker (scikit-image's default 130).
    mode : {"auto", "cg_j", "bf", "cg"}
        Solver. ``"auto"`` solves directly ("bf") up to ``DIRECT_SOLVE_MAX`` unknown
        pixels, which keeps the time predictable, and uses Jacobi-preconditioned
        conjugate gradients ("cg_j") above.
    snap : bool
        Snap the result to SLIC superpixels (:func:`snap_to_superpixels`); a snapped
        class that is not seeded in a pixel's colour region is taken back.
    n_segments, compactness
        SLIC options when ``snap`` is true.
    edge_threshold : float or None
        Colour gradient (Delta E*ab per pixel) that bounds the colour regions in soil;
        ``None`` treats the band as one region (the plain random walker, no split).
    plant_edge_threshold : float
        Colour gradient that bounds the colour regions inside vegetation.
    edge_sigma : float
        Gaussian smoothing before the colour gradient, pixels.
    vegetation : ndarray, shape (H, W), bool, optional
        The vegetation/soil split of ``image``; by default
        :func:`labeler.masks.vegetation.vegetation_mask` of the whole tile.
    grow_max_share : float
        The band also takes in every vegetation region (of the split) that holds a mark,
        so a scribble in a plant's core decides the whole plant, not only the part within
        ``band_px``; regions larger than this share of the tile (a closed canopy) are not
        taken in. Ignored when ``edge_threshold`` is None.

    Returns
    -------
    refined : ndarray, shape (H, W), uint8
        A new array; equal to ``mask`` when nothing is marked.
    """
    img = _check_image(image)
    m = _check_like(mask, img, "mask")
    s = _check_like(weak_label, img, "weak_label")
    if mode not in ("auto", "cg_j", "bf", "cg"):
        raise ValueError(f"mode: expected 'auto', 'cg_j', 'bf' or 'cg', got {mode!r}")
    out = m.copy()
    band = weak_label_band(s, band_px=band_px)
    if not band.any():
        return out
    full_regions = None
    if edge_threshold is not None:
        veg = vegetation_mask(img) if vegetation is None else np.asarray(vegetation)
        if veg.shape != img.shape[:2] or veg.dtype != bool:
            raise ValueError(
                f"vegetation: expected a bool array of shape {img.shape[:2]} like image, "
                f"got shape {veg.shape} dtype {veg.dtype}; pass vegetation_mask(image)"
            )
        full_regions = split_regions(
            img, vegetation=veg, edge_threshold=edge_threshold,
            plant_edge_threshold=plant_edge_threshold, sigma=edge_sigma,
        )
        grow = _marked_plants(full_regions, veg, s != UNLABELLED, max_share=grow_max_share)
        band |= grow
        # pixels of a grown plant region at the split that look like soil (blended leaf
        # edges) keep the current mask
        keep = grow & ~sharpen_split(img, veg) & (s == UNLABELLED)
    rs, cs = region_bounds(band, pad=1)
    b = band[rs, cs]
    sub_s = s[rs, cs]
    sub_m = m[rs, cs]
    seeded = sub_s != UNLABELLED
    rim = ndi.binary_dilation(b) & ~b
    rim_ok = rim & (sub_m != UNLABELLED)
    classes = np.unique(np.concatenate([sub_s[seeded], sub_m[rim_ok]]))
    lut = np.zeros(256, np.int32)
    lut[classes] = np.arange(len(classes), dtype=np.int32)
    seed_class = np.full(b.shape, -1, np.int32)  # index into classes; -1: no seed
    seed_class[rim_ok] = lut[sub_m[rim_ok]]
    seed_class[seeded] = lut[sub_s[seeded]]
    if full_regions is None:
        regions = np.ones(b.shape, np.int32)
    else:
        regions = full_regions[rs, cs]
    # allowed[region, k]: class k has a seed inside the region
    allowed = np.zeros((int(regions.max()) + 1, len(classes)), bool)
    has_seed = seed_class >= 0
    allowed[regions[has_seed], seed_class[has_seed]] = True
    n_allowed = allowed.sum(axis=1)[regions]
    result = sub_m.copy()
    single = b & (n_allowed == 1)
    result[single] = classes[allowed[regions[single]].argmax(axis=1)]
    several = b & (n_allowed >= 2) & ~seeded
    if several.any():
        prob = _walker_probabilities(img[rs, cs], b, seed_class, len(classes), beta, mode)
        prob = np.where(allowed[regions].transpose(2, 0, 1), prob, -1.0)
        best = prob.argmax(axis=0)
        decided = several & (prob.max(axis=0) > 0)  # pixels cut off from every seed stay
        result[decided] = classes[best[decided]]
    if snap:
        snapped = snap_to_superpixels(
            img[rs, cs], result, region=b, n_segments=n_segments, compactness=compactness
        )
        k = lut[snapped]
        known = np.isin(snapped, classes)
        ok = known & allowed[regions, np.where(known, k, 0)]
        result = np.where(ok & (n_allowed > 0), snapped, result)
    result[seeded] = sub_s[seeded]
    out[rs, cs] = np.where(b, result, sub_m)
    if full_regions is not None:
        out[keep] = m[keep]
    return out


def _marked_plants(
    regions: np.ndarray, vegetation: np.ndarray, marked: np.ndarray, *, max_share: float
) -> np.ndarray:
    """Vegetation regions holding a marked pixel, each at most ``max_share`` of the tile."""
    if not np.isfinite(max_share) or not 0 <= max_share <= 1:
        raise ValueError(f"grow_max_share: expected a share in 0..1, got {max_share}")
    ids = np.unique(regions[marked & vegetation])
    ids = ids[ids > 0]
    if ids.size == 0:
        return np.zeros(regions.shape, bool)
    sizes = np.bincount(regions.ravel(), minlength=int(regions.max()) + 1)
    ids = ids[sizes[ids] <= max_share * regions.size]
    return np.isin(regions, ids)


def _walker_probabilities(
    image: np.ndarray,
    band: np.ndarray,
    seed_class: np.ndarray,
    n_classes: int,
    beta: float,
    mode: str,
) -> np.ndarray:
    """Random-walker probabilities ``(n_classes, h, w)`` on the band; 0 where undecided."""
    labels = np.full(band.shape, -1, np.int32)  # -1: outside band and rim, left out
    labels[band] = 0
    labels[seed_class >= 0] = seed_class[seed_class >= 0] + 1
    prob = np.zeros((n_classes, *band.shape))
    unknown = labels == 0
    # scikit-image solves nothing (and returns another layout) when no unknown pixel is
    # joined to a seed; those pixels stay undecided
    reachable = ndi.binary_propagation(labels > 0, mask=labels >= 0) & unknown
    if not reachable.any():
        return prob
    solver = mode
    if mode == "auto":
        solver = "bf" if int(unknown.sum()) <= DIRECT_SOLVE_MAX else "cg_j"
    with warnings.catch_warnings():
        # the iterative solvers stop at tol=1e-3, so probabilities may leave [0, 1] by a
        # little; only their argmax is used, which that does not change in practice
        warnings.filterwarnings("ignore", message="The probability range is outside")
        warnings.filterwarnings("ignore", message="Conjugate gradient convergence")
        walked = random_walker(
            image, labels, beta=beta, mode=solver, channel_axis=-1, return_full_prob=True
        )
    present = np.unique(labels[labels > 0]) - 1  # scikit-image numbers present labels only
    prob[present] = walked
    return prob


def snap_to_superpixels(
    image: np.ndarray,
    mask: np.ndarray,
    *,
    region: np.ndarray,
    n_segments: int = 400,
    compactness: float = 10.0,
) -> np.ndarray:
    """Give every SLIC superpixel the majority class of its pixels inside ``region``.

    SLIC superpixels (Achanta et al. 2012, ``skimage.segmentation.slic``) follow colour
    edges, so snapping moves a boundary onto the nearest edge. Only pixels in ``region``
    change; ties go to the smaller class index.

    Parameters
    ----------
    image : ndarray, shape (H, W, 3), uint8
    mask : ndarray, shape (H, W), uint8
    region : ndarray, shape (H, W), bool
        Pixels allowed to change (and voting).
    n_segments : int
        Approximate number of superpixels over the image.
    compactness : float
        SLIC trade-off between colour and space (larger = rounder superpixels).

    Returns
    -------
    snapped : ndarray, shape (H, W), uint8
    """
    img = _check_image(image)
    m = _check_like(mask, img, "mask")
    reg = np.asarray(region, bool)
    if reg.shape != m.shape:
        raise ValueError(f"region: expected shape {m.shape} like mask, got {reg.shape}")
    if n_segments < 1:
        raise ValueError(f"n_segments: expected at least 1, got {n_segments}")
    out = m.copy()
    if not reg.any():
        return out
    segments = slic(
        img, n_segments=n_segments, compactness=compactness, start_label=0, channel_axis=-1
    )
    n_seg = int(segments.max()) + 1
    votes = np.zeros((n_seg, 256), np.int64)
    np.add.at(votes, (segments[reg], m[reg]), 1)
    winner = votes.argmax(axis=1).astype(np.uint8)
    out[reg] = winner[segments[reg]]
    return out


def grabcut_box(
    image: np.ndarray,
    box: tuple[int, int, int, int],
    *,
    iterations: int = 5,
    margin_px: int = 16,
) -> np.ndarray:
    """Foreground inside a box by GrabCut (Rother, Kolmogorov & Blake 2004; OpenCV).

    Runs ``cv2.grabCut(img, mask, rect, bgd, fgd, iterations, cv2.GC_INIT_WITH_RECT)``
    with empty colour models ``np.zeros((1, 65))`` on the box plus a margin of the tile
    around it (the margin gives the background model its samples).

    Parameters
    ----------
    image : ndarray, shape (H, W, 3), uint8
        The RGB tile.
    box : (int, int, int, int)
        ``(row0, col0, row1, col1)``, half-open pixel box; at least 2 x 2 pixels, and the
        tile must have pixels outside it.
    iterations : int
        GrabCut iterations, at least 1.
    margin_px : int
        Background context taken around the box (clipped to the tile).

    Returns
    -------
    foreground : ndarray, shape (H, W), bool
        True for pixels GrabCut calls (probable) foreground; always False outside the box.
    """
    img = _check_image(image)
    h, w = img.shape[:2]
    if len(box) != 4:
        raise ValueError(f"box: expected (row0, col0, row1, col1), got {box!r}")
    r0, c0, r1, c1 = (int(v) for v in box)
    r0, c0 = max(r0, 0), max(c0, 0)
    r1, c1 = min(r1, h), min(c1, w)
    if r1 - r0 < 2 or c1 - c0 < 2:
        raise ValueError(
            f"box: expected at least 2 x 2 pixels inside the tile, got rows {r0}..{r1} "
            f"cols {c0}..{c1}; drag a larger box"
        )
    if r0 == 0 and c0 == 0 and r1 == h and c1 == w:
        raise ValueError(
            "box: covers the whole tile, so GrabCut has no background to learn from; "
            "draw the box around one plant"
        )
    if iterations < 1:
        raise ValueError(f"iterations: expected at least 1, got {iterations}")
    pad = max(int(margin_px), 1)
    cr0, cc0 = max(r0 - pad, 0), max(c0 - pad, 0)
    cr1, cc1 = min(r1 + pad, h), min(c1 + pad, w)
    crop = np.ascontiguousarray(img[cr0:cr1, cc0:cc1, ::-1])  # OpenCV works in BGR
    gc_mask = np.zeros(crop.shape[:2], np.uint8)
    bgd = np.zeros((1, 65), np.float64)
    fgd = np.zeros((1, 65), np.float64)
    # OpenCV's rect is (x, y, width, height): columns first, at this boundary only
    rect = (c0 - cc0, r0 - cr0, c1 - c0, r1 - r0)
    cv2.grabCut(crop, gc_mask, rect, bgd, fgd, int(iterations), cv2.GC_INIT_WITH_RECT)
    fg = (gc_mask == cv2.GC_FGD) | (gc_mask == cv2.GC_PR_FGD)
    out = np.zeros((h, w), bool)
    out[cr0:cr1, cc0:cc1] = fg
    inside = np.zeros((h, w), bool)
    inside[r0:r1, c0:c1] = True
    return out & inside
