"""A simulated annotator: noisy corrections and weak labels made from an exact truth mask.

Pure numpy (and scipy.ndimage). The demo and the agreement tests use it to stand in for
people: two simulated annotators with their own generators disagree the way two people
do, at the boundaries and on small, ambiguous regions.

:func:`simulate_annotation` applies, in this order,

1. missed small weeds: a weed region (8-connected) of at most ``small_weed_px`` pixels is
   labelled soil with probability ``miss_small_weed``;
2. class confusion: a crop or weed region of at most ``confusion_max_px`` pixels takes the
   other class with probability ``confusion``;
3. symptoms: a lesion is missed (takes the surrounding class, usually crop) with
   probability ``symptom_miss``, or else painted ``symptom_grow_px`` larger over crop
   with probability ``symptom_grow``;
4. boundary jitter: every class boundary moves locally by 0 to ``boundary_px`` pixels,
   outwards in some places and inwards in others (a smooth random field per class decides
   which class wins at each boundary pixel).

Pixels that are unlabelled (255) in the truth stay unlabelled.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import ndimage

from labeler.classes import UNLABELLED

__all__ = [
    "AnnotatorProfile",
    "simulate_annotation",
    "simulate_weak_label",
]

SOIL, CROP, WEED, SYMPTOM = 0, 1, 2, 3
_EIGHT = np.ones((3, 3), bool)


@dataclass(frozen=True)
class AnnotatorProfile:
    """Error rates of a simulated annotator.

    Attributes
    ----------
    boundary_px : float
        Largest local boundary shift in pixels, 0..4.
    boundary_scale_px : float
        Length over which the shift changes along a boundary (smoothness).
    miss_small_weed : float
        Probability that a small weed is left as soil.
    small_weed_px : int
        Weeds of at most this many pixels count as small.
    confusion : float
        Probability that a small crop or weed region takes the other class.
    confusion_max_px : int
        Regions of at most this many pixels can be confused.
    symptom_miss : float
        Probability that a lesion is not marked.
    symptom_grow : float
        Probability that a marked lesion is painted larger.
    symptom_grow_px : int
        How much larger, in pixels.
    """

    boundary_px: float = 1.0
    boundary_scale_px: float = 12.0
    miss_small_weed: float = 0.1
    small_weed_px: int = 80
    confusion: float = 0.05
    confusion_max_px: int = 400
    symptom_miss: float = 0.1
    symptom_grow: float = 0.2
    symptom_grow_px: int = 2

    def __post_init__(self) -> None:
        if not 0.0 <= self.boundary_px <= 4.0:
            raise ValueError(f"boundary_px: expected 0..4 pixels, got {self.boundary_px}")
        if self.boundary_scale_px <= 0:
            raise ValueError(
                f"boundary_scale_px: expected a positive length, got {self.boundary_scale_px}"
            )
        for name in ("miss_small_weed", "confusion", "symptom_miss", "symptom_grow"):
            value = getattr(self, name)
            if not 0.0 <= value <= 1.0:
                raise ValueError(f"{name}: expected a probability in 0..1, got {value}")
        for name in ("small_weed_px", "confusion_max_px", "symptom_grow_px"):
            value = getattr(self, name)
            if value < 0:
                raise ValueError(f"{name}: expected a pixel count >= 0, got {value}")

    @classmethod
    def from_skill(cls, skill: float) -> AnnotatorProfile:
        """Rates for a ``skill`` in 0..1: 1 is a perfect annotator, 0 a careless one.

        Boundaries move by up to 1 px at skill 0.8 and up to 2 px at skill 0.6 and below;
        at skill 0 half the small weeds and lesions are missed and a fifth of the small
        regions are confused.
        """
        if not 0.0 <= skill <= 1.0:
            raise ValueError(f"skill: expected a value in 0..1, got {skill}")
        e = 1.0 - float(skill)
        return cls(
            boundary_px=min(2.0, 5.0 * e),
            miss_small_weed=0.5 * e,
            confusion=0.2 * e,
            symptom_miss=0.5 * e,
            symptom_grow=0.6 * e,
            symptom_grow_px=2 if e > 0.5 else 1,
        )


def _check_truth(truth: np.ndarray) -> np.ndarray:
    t = np.asarray(truth)
    if t.ndim != 2 or t.dtype != np.uint8:
        raise ValueError(
            f"truth: expected a 2-D uint8 class mask, got shape {t.shape} dtype {t.dtype}"
        )
    if t.size == 0:
        raise ValueError(f"truth: expected a non-empty mask, got shape {t.shape}")
    return t


def _check_rng(rng: object) -> np.random.Generator:
    if not isinstance(rng, np.random.Generator):
        raise TypeError(
            f"rng: expected a numpy Generator, got {type(rng).__name__}; "
            "pass np.random.default_rng(seed)"
        )
    return rng


def _components(mask: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """8-connected labels and sizes (index 0 = outside)."""
    labels, _ = ndimage.label(mask, structure=_EIGHT)
    return labels, np.bincount(labels.ravel())


def _surrounding_class(out: np.ndarray, region: np.ndarray, fallback: int) -> int:
    ring = ndimage.binary_dilation(region, structure=_EIGHT) & ~region
    values = out[ring]
    values = values[(values != SYMPTOM) & (values != UNLABELLED)]
    if values.size == 0:
        return fallback
    return int(np.bincount(values).argmax())


def _region_errors(
    truth: np.ndarray, rng: np.random.Generator, p: AnnotatorProfile
) -> np.ndarray:
    out = truth.copy()
    # 1. small weeds missed
    labels, sizes = _components(truth == WEED)
    draws = rng.random(sizes.size)
    missed = (sizes <= p.small_weed_px) & (draws < p.miss_small_weed)
    missed[0] = False
    out[missed[labels]] = SOIL
    # 2. small crop/weed regions confused (regions of the truth, not yet missed)
    for cls, other in ((CROP, WEED), (WEED, CROP)):
        labels, sizes = _components(truth == cls)
        draws = rng.random(sizes.size)
        flip = (sizes <= p.confusion_max_px) & (draws < p.confusion)
        flip[0] = False
        if cls == WEED:
            flip &= ~missed  # same labelling as step 1: a missed weed stays missed
        out[flip[labels] & (out == cls)] = other
    # 3. symptoms missed or enlarged
    labels, sizes = _components(truth == SYMPTOM)
    n = sizes.size - 1
    miss_draw = rng.random(n)
    grow_draw = rng.random(n)
    if n:
        objects = ndimage.find_objects(labels)
        pad = p.symptom_grow_px + 2
        for k, sl in enumerate(objects, start=1):
            r0 = max(0, sl[0].start - pad)
            r1 = min(truth.shape[0], sl[0].stop + pad)
            c0 = max(0, sl[1].start - pad)
            c1 = min(truth.shape[1], sl[1].stop + pad)
            win = (slice(r0, r1), slice(c0, c1))
            region = labels[win] == k
            view = out[win]
            if miss_draw[k - 1] < p.symptom_miss:
                view[region] = _surrounding_class(view, region, CROP)
            elif grow_draw[k - 1] < p.symptom_grow and p.symptom_grow_px > 0:
                grown = ndimage.binary_dilation(
                    region, structure=_EIGHT, iterations=p.symptom_grow_px
                )
                view[grown & (view == CROP)] = SYMPTOM
    return out


def _smooth_field(rng: np.random.Generator, shape: tuple[int, int], scale: float) -> np.ndarray:
    z = ndimage.gaussian_filter(rng.standard_normal(shape), scale, mode="wrap")
    sd = z.std()
    return z / sd if sd > 0 else z


def _boundary_jitter(
    mask: np.ndarray, rng: np.random.Generator, p: AnnotatorProfile
) -> np.ndarray:
    """Move class boundaries locally by 0..boundary_px pixels (multi-class)."""
    if p.boundary_px <= 0:
        return mask
    labelled = mask != UNLABELLED
    classes = [int(c) for c in np.unique(mask[labelled])]
    if len(classes) < 2:
        return mask
    reach = p.boundary_px
    scores = np.empty((len(classes),) + mask.shape)
    for i, c in enumerate(classes):
        dist = ndimage.distance_transform_edt(mask != c)
        bias = reach * np.clip(_smooth_field(rng, mask.shape, p.boundary_scale_px) / 1.5, -1, 1)
        # own class scores -bias; another class within reach wins where its bias exceeds
        # the own class's bias by more than its distance: a local shift of <= reach px
        scores[i] = np.where(dist > reach, np.inf, dist) - bias
    pick = np.asarray(classes, np.uint8)[np.argmin(scores, axis=0)]
    return np.where(labelled, pick, mask)


def simulate_annotation(
    truth: np.ndarray,
    *,
    rng: np.random.Generator,
    skill: float = 0.8,
    profile: AnnotatorProfile | None = None,
) -> np.ndarray:
    """A plausible human correction of ``truth``.

    Parameters
    ----------
    truth : ndarray, shape (H, W), uint8
        Exact classes (0 soil, 1 crop, 2 weed, 3 symptom; 255 unlabelled is kept).
    rng : numpy.random.Generator
        Source of all randomness: the same generator state gives the same mask.
    skill : float
        0..1, turned into rates by :meth:`AnnotatorProfile.from_skill` (1: no errors).
    profile : AnnotatorProfile, optional
        Explicit rates; overrides ``skill``.

    Returns
    -------
    mask : ndarray, shape (H, W), uint8
    """
    t = _check_truth(truth)
    g = _check_rng(rng)
    p = AnnotatorProfile.from_skill(skill) if profile is None else profile
    out = _region_errors(t, g, p)
    return _boundary_jitter(out, g, p)


def _stroke_points(
    start: tuple[int, int], inside: np.ndarray, rng: np.random.Generator, length: float
) -> list[tuple[float, float]]:
    """A smooth wandering stroke from ``start`` that stays where ``inside`` is true."""
    h, w = inside.shape
    heading = rng.uniform(0, 2 * np.pi)
    turns = rng.normal(0, 0.12, size=(2, int(length) + 1))
    points = [(float(start[0]), float(start[1]))]
    for side in (0, 1):
        r, c = float(start[0]), float(start[1])
        a = heading + side * np.pi
        for step in range(int(length / 2)):
            a += turns[side, step]
            nr, nc = r + np.sin(a), c + np.cos(a)
            ir, ic = int(round(nr)), int(round(nc))
            if not (0 <= ir < h and 0 <= ic < w and inside[ir, ic]):
                break
            r, c = nr, nc
            points.append((r, c))
    return points


def simulate_weak_label(
    truth: np.ndarray,
    *,
    rng: np.random.Generator,
    n_per_class: int = 3,
    width_px: float = 3.0,
    length_px: float = 40.0,
    classes: tuple[int, ...] | None = None,
) -> np.ndarray:
    """A weak label: a few strokes inside each class, 255 (unlabelled) elsewhere.

    Every stroke pixel carries its true class. Where a region is wide enough, strokes
    keep off its edge pixels (stroke centres lie ``width_px / 2 + 2`` px inside); thin
    regions get strokes along their middle.

    Parameters
    ----------
    truth : ndarray, shape (H, W), uint8
    rng : numpy.random.Generator
    n_per_class : int
        Strokes per class (each in a region chosen with probability growing with its
        size), at least 1.
    width_px, length_px : float
        Stroke width and typical length (each stroke is 0.5 to 1.5 times as long).
    classes : tuple of int, optional
        Classes to mark; default every class present except 255.

    Returns
    -------
    weak : ndarray, shape (H, W), uint8
        Class index on stroke pixels, 255 elsewhere.
    """
    t = _check_truth(truth)
    g = _check_rng(rng)
    if n_per_class < 1:
        raise ValueError(f"n_per_class: expected at least 1 stroke, got {n_per_class}")
    if width_px < 1:
        raise ValueError(f"width_px: expected at least 1 pixel, got {width_px}")
    if length_px < 1:
        raise ValueError(f"length_px: expected at least 1 pixel, got {length_px}")
    present = [int(c) for c in np.unique(t) if c != UNLABELLED]
    if classes is None:
        wanted = present
    else:
        wanted = [int(c) for c in classes if int(c) in present]
    weak = np.full(t.shape, UNLABELLED, np.uint8)
    radius = width_px / 2.0
    span = int(np.ceil(radius))
    dr, dc = np.mgrid[-span : span + 1, -span : span + 1]
    stamp = dr * dr + dc * dc <= radius * radius + 1e-9
    offsets = np.stack([dr[stamp], dc[stamp]], axis=1)
    for cls in wanted:
        region = t == cls
        labels, sizes = _components(region)
        weights = np.sqrt(sizes[1:].astype(np.float64))
        weights /= weights.sum()
        comp = g.choice(np.arange(1, sizes.size), size=n_per_class, p=weights)
        boxes = ndimage.find_objects(labels)
        for k in comp:
            box = boxes[k - 1]
            r0, c0 = box[0].start, box[1].start
            part = np.pad(labels[box] == k, 1)
            depth = ndimage.distance_transform_edt(part)[1:-1, 1:-1]
            # thin regions: their deepest pixels; wide ones keep the stroke off the edge
            inside = depth >= min(float(depth.max()), radius + 2.0)
            rr, cc = np.nonzero(inside)
            j = int(g.integers(rr.size))
            length = length_px * g.uniform(0.5, 1.5)
            pts = np.rint(np.asarray(_stroke_points((rr[j], cc[j]), inside, g, length)))
            cells = (pts[:, None, :] + offsets[None, :, :]).reshape(-1, 2).astype(np.int64)
            cells += np.array([r0, c0])
            ok = (
                (cells[:, 0] >= 0) & (cells[:, 0] < t.shape[0])
                & (cells[:, 1] >= 0) & (cells[:, 1] < t.shape[1])
            )
            cells = cells[ok]
            keep = region[cells[:, 0], cells[:, 1]]
            weak[cells[keep, 0], cells[keep, 1]] = cls
    return weak
