"""Pool agreement figures over images labelled by several annotators (the report's data).

:func:`summarise_agreement` turns a list of :class:`~labeler.agreement.figures.ComparedImage`
into an :class:`~labeler.agreement.figures.AgreementSummary`: figures per annotator pair,
per class, per image (and tile window), per day. Pure numpy; the store hands the masks
over and the report writer draws the result.
"""

from __future__ import annotations

import itertools
import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from datetime import date, datetime

import numpy as np

from labeler.agreement.figures import (
    AgreementSummary,
    ClassFigures,
    ComparedImage,
    DayFigures,
    ImageFigures,
    PairFigures,
    TileFigures,
)
from labeler.agreement.kappa import cohen_kappa, kappa_per_class, landis_koch_band
from labeler.agreement.tile import _check_metric
from labeler.classes import ClassSchema
from labeler.metrics import (
    confusion_matrix,
    dice_per_class,
    iou_per_class,
    mean_iou,
    pixel_accuracy,
)

__all__ = ["summarise_agreement"]

Pair = tuple[str, str]
Window = tuple[int, int, int, int]

#: Pixels of one strip when masks are compared (4 Mpx: a few MB per annotator).
_STRIP_PX = 1 << 22


# ---------------------------------------------------------------------------------------
# checks of one compared image
# ---------------------------------------------------------------------------------------
def _window_tuple(win: object, name: str) -> Window:
    if hasattr(win, "as_tuple"):
        win = win.as_tuple()
    try:
        row, col, height, width = (int(v) for v in win)  # type: ignore[union-attr]
    except (TypeError, ValueError):
        raise ValueError(
            f"{name}: expected a window (row, col, height, width) or a tiling.Window, "
            f"got {win!r}"
        ) from None
    if row < 0 or col < 0 or height < 1 or width < 1:
        raise ValueError(f"{name}: expected row, col >= 0 and a positive size, got {win!r}")
    return row, col, height, width


def _checked_item(item: object, schema: ClassSchema) -> tuple[tuple[str, ...], dict[str, Window]]:
    """Annotator names (sorted) and tile windows of ``item``, after checking it whole."""
    if not isinstance(item, ComparedImage):
        raise TypeError(f"items: expected ComparedImage entries, got {type(item).__name__}")
    names = tuple(sorted(item.masks))
    missing = [n for n in names if n not in item.saved_at]
    if missing:
        raise ValueError(
            f"{item.image}: saved_at lacks the annotator(s) {missing}; "
            "give a save time for every mask"
        )
    shape = None
    for name in names:
        mask = item.masks[name]
        if isinstance(mask, np.ndarray) or not hasattr(mask, "shape"):
            mask = np.asarray(mask)
            schema.check_mask(mask, name=f"{item.image}: mask of {name}")
        elif len(mask.shape) != 2:
            raise ValueError(
                f"{item.image}: mask of {name} has shape {mask.shape}, expected (H, W)"
            )
        if shape is None:
            shape = tuple(mask.shape)
        elif tuple(mask.shape) != shape:
            raise ValueError(
                f"{item.image}: mask of {name} has shape {mask.shape}, expected {shape} "
                "like the other annotators'; pass stitched masks of the same image"
            )
    windows = {str(t): _window_tuple(w, f"{item.image}: tile {t}") for t, w in item.tiles.items()}
    if shape is not None:
        for t, (r0, c0, hh, ww) in windows.items():
            if r0 + hh > shape[0] or c0 + ww > shape[1]:
                raise ValueError(
                    f"{item.image}: tile {t} window {(r0, c0, hh, ww)} reaches beyond "
                    f"the image of shape {shape}"
                )
    return names, windows


def _later(a: datetime, b: datetime, image: str) -> datetime:
    try:
        return max(a, b)
    except TypeError:
        raise ValueError(
            f"{image}: saved_at mixes timezone-aware and naive datetimes; "
            "pass all times in one form (e.g. UTC-aware)"
        ) from None


def _on_or_after(when: datetime, since: date | datetime | None, image: str) -> bool:
    if since is None:
        return True
    try:
        if isinstance(since, datetime):
            return when >= since
        return when.date() >= since
    except TypeError:
        raise ValueError(
            f"since: cannot compare {since!r} with the save times of {image}; "
            "pass a date, or a datetime of the same timezone form as the saves"
        ) from None


# ---------------------------------------------------------------------------------------
# figures from confusion matrices
# ---------------------------------------------------------------------------------------
def _pair_figures(names: Pair, cm: np.ndarray, images: int) -> PairFigures:
    total = int(cm.sum())
    kappa = cohen_kappa(cm) if total else math.nan
    return PairFigures(
        annotators=names,
        confusion=cm,
        images_compared=images,
        pixels_compared=total,
        kappa=kappa,
        band=landis_koch_band(kappa),
        pixel_accuracy=pixel_accuracy(cm),
        mean_iou=mean_iou(cm),
        iou=iou_per_class(cm),
        dice=dice_per_class(cm),
        class_kappa=kappa_per_class(cm),
    )


def _scalar(cm: np.ndarray, metric: str) -> tuple[float, float, float]:
    """``(agreement, kappa, mean IoU)`` of ``cm``; all ``nan`` when nothing was compared."""
    if cm.sum() == 0:
        return math.nan, math.nan, math.nan
    kappa, miou = cohen_kappa(cm), mean_iou(cm)
    return (kappa if metric == "kappa" else miou), kappa, miou


@dataclass
class _Pooled:
    """Confusion matrices (K, K) pooled per annotator pair and per day."""

    k: int
    pair_cm: dict[Pair, np.ndarray] = field(default_factory=dict)
    pair_images: dict[Pair, int] = field(default_factory=dict)
    day_cm: dict[date, np.ndarray] = field(default_factory=dict)
    day_count: dict[date, int] = field(default_factory=dict)

    def list_pair(self, key: Pair) -> None:
        """Make the pair known (listed even when it never shares a pixel)."""
        self.pair_cm.setdefault(key, np.zeros((self.k, self.k), np.int64))
        self.pair_images.setdefault(key, 0)

    def add(self, key: Pair, day: date, cm: np.ndarray) -> None:
        """Add one pair comparison of one image, dated by its later save."""
        self.pair_cm[key] += cm
        self.pair_images[key] += 1
        self.day_cm.setdefault(day, np.zeros((self.k, self.k), np.int64))
        self.day_cm[day] += cm
        self.day_count[day] = self.day_count.get(day, 0) + 1


def _strip_rows(shape: tuple[int, int]) -> list[tuple[int, int]]:
    """Row ranges of the strips an image's masks are compared in (bounded memory)."""
    height, width = shape
    step = max(1, _STRIP_PX // max(1, width))
    return [(r, min(height, r + step)) for r in range(0, height, step)]


def _image_figures(
    item: ComparedImage,
    names: tuple[str, ...],
    windows: dict[str, Window],
    *,
    schema: ClassSchema,
    pooled: _Pooled,
    metric: str,
    since: date | datetime | None,
) -> ImageFigures:
    """Compare every annotator pair of one image, adding to ``pooled`` as it goes.

    The masks are read and compared strip by strip (:data:`_STRIP_PX` pixels), so an
    image's masks are never held whole; confusion matrices add up over the strips.
    """
    k = pooled.k
    image_cm = np.zeros((k, k), np.int64)
    tile_cm = {t: np.zeros((k, k), np.int64) for t in windows}
    worst: Pair | None = None
    worst_value = math.nan
    last = None
    compared: list[tuple[Pair, datetime]] = []
    for a, b in itertools.combinations(names, 2):
        key = (a, b)
        pooled.list_pair(key)
        later = _later(item.saved_at[a], item.saved_at[b], item.image)
        if not _on_or_after(later, since, item.image):
            continue
        last = later if last is None else _later(last, later, item.image)
        compared.append((key, later))
    pair_cm = {key: np.zeros((k, k), np.int64) for key, _ in compared}
    tile_ids = list(windows)
    boxes = np.array([windows[t] for t in tile_ids], np.int64).reshape(-1, 4)
    wanted = sorted({n for key, _ in compared for n in key})
    shape = tuple(item.masks[names[0]].shape) if names else (0, 0)
    for r0, r1 in _strip_rows(shape) if compared else ():
        rows = {}
        for n in wanted:
            part = np.asarray(item.masks[n][r0:r1])
            if part.shape != (r1 - r0, shape[1]):
                raise ValueError(
                    f"{item.image}: mask of {n} rows {r0}..{r1} read as shape {part.shape}, "
                    f"expected {(r1 - r0, shape[1])}"
                )
            schema.check_mask(part, name=f"{item.image}: mask of {n}")
            rows[n] = part
        hit = np.flatnonzero((boxes[:, 0] < r1) & (boxes[:, 0] + boxes[:, 2] > r0))
        for key, _ in compared:
            ma, mb = rows[key[0]], rows[key[1]]
            pair_cm[key] += confusion_matrix(ma, mb, n_classes=k)
            for j in hit:
                tr, tc, th, tw = (int(v) for v in boxes[j])
                sl = (slice(max(tr, r0) - r0, min(tr + th, r1) - r0), slice(tc, tc + tw))
                tile_cm[tile_ids[j]] += confusion_matrix(ma[sl], mb[sl], n_classes=k)
    for key, later in compared:
        cm = pair_cm[key]
        if cm.sum() == 0:
            continue
        pooled.add(key, later.date(), cm)
        image_cm += cm
        value = _scalar(cm, metric)[0]
        if worst is None or (not math.isnan(value) and not value >= worst_value):
            worst, worst_value = key, value
    agreement, kappa, miou = _scalar(image_cm, metric)
    if last is None:
        saves = [item.saved_at[n] for n in names]
        last = max(saves) if saves else datetime.min
    tiles = tuple(
        TileFigures(
            image=item.image,
            tile=t,
            window=windows[t],
            agreement=(s := _scalar(tile_cm[t], metric))[0],
            kappa=s[1],
            mean_iou=s[2],
            pixels_compared=int(tile_cm[t].sum()),
        )
        for t in windows
    )
    return ImageFigures(
        image=item.image,
        annotators=names,
        agreement=agreement,
        kappa=kappa,
        mean_iou=miou,
        pixels_compared=int(image_cm.sum()),
        worst_pair=worst,
        worst_value=worst_value,
        last_saved=last,
        tiles=tiles,
    )


def _class_figures(schema: ClassSchema, overall: PairFigures) -> tuple[ClassFigures, ...]:
    pooled = overall.confusion
    return tuple(
        ClassFigures(
            index=c.index,
            name=c.name,
            iou=float(overall.iou[c.index]),
            dice=float(overall.dice[c.index]),
            kappa=float(overall.class_kappa[c.index]),
            band=landis_koch_band(overall.class_kappa[c.index]),
            pixels=int(pooled[c.index].sum() + pooled[:, c.index].sum() - pooled[c.index, c.index]),
        )
        for c in schema
    )


def _day_figures(pooled: _Pooled) -> tuple[DayFigures, ...]:
    return tuple(
        DayFigures(
            day=d,
            kappa=cohen_kappa(pooled.day_cm[d]),
            mean_iou=mean_iou(pooled.day_cm[d]),
            pixel_accuracy=pixel_accuracy(pooled.day_cm[d]),
            comparisons=pooled.day_count[d],
            pixels_compared=int(pooled.day_cm[d].sum()),
        )
        for d in sorted(pooled.day_cm)
    )


# ---------------------------------------------------------------------------------------
# the summary
# ---------------------------------------------------------------------------------------
def summarise_agreement(
    items: Sequence[ComparedImage],
    *,
    schema: ClassSchema,
    metric: str = "kappa",
    since: date | datetime | None = None,
    progress: Callable[[int, int], None] | None = None,
) -> AgreementSummary:
    """Pool agreement figures over images labelled by several annotators.

    Parameters
    ----------
    items : sequence of ComparedImage
        Images with two or more annotators' stitched masks, each (H, W) uint8 (images
        with fewer annotators are listed with ``nan`` agreement and contribute nothing).
        A mask may be an array or any object with ``shape`` whose ``mask[r0:r1]``
        returns rows (e.g. a lazily stitched mask): masks are compared strip by strip.
    schema : ClassSchema
        Label schema; masks are checked against it and K = ``schema.n_values``.
    metric : {"kappa", "iou"}
        Metric of the per-image / per-tile ``agreement`` values (the project's
        ``agreement.metric`` setting).
    since : date or datetime, optional
        Only pair comparisons whose later save is on or after ``since`` count.
    progress : callable(done, total), optional
        Called after each image.

    Returns
    -------
    AgreementSummary
        Confusion matrices (K, K) per pair; per-class arrays (K,) by class index.

    Raises
    ------
    TypeError
        ``schema`` is not a ClassSchema, or an item is not a ComparedImage.
    ValueError
        Unknown ``metric``; a mask off the schema or of another shape than its image's
        other masks; a save time missing or not comparable; a tile window outside the
        image. The message names the image.

    Notes
    -----
    For every image and every pair of its annotators (names sorted), the confusion
    matrix of the pixels both labelled is added to the pair's pooled matrix; each
    image pixel is counted once per pair. Per-class figures pool every pair; the
    figures per day pool every pair comparison by the calendar day of its later save.
    A pair with no commonly labelled pixel is listed with 0 images and 0 pixels
    compared and ``nan`` figures.
    """
    _check_metric(metric)
    if not isinstance(schema, ClassSchema):
        raise TypeError(f"schema: expected a ClassSchema, got {type(schema).__name__}")
    k = schema.n_values
    pooled = _Pooled(k)
    images: list[ImageFigures] = []
    total = len(items)
    for done, item in enumerate(items, start=1):
        names, windows = _checked_item(item, schema)
        images.append(
            _image_figures(
                item, names, windows, schema=schema, pooled=pooled, metric=metric, since=since
            )
        )
        if progress is not None:
            progress(done, total)

    pairs = tuple(
        _pair_figures(key, pooled.pair_cm[key], pooled.pair_images[key])
        for key in sorted(pooled.pair_cm)
    )
    everything = np.zeros((k, k), np.int64)
    for cm in pooled.pair_cm.values():
        everything += cm
    overall = _pair_figures(("all", "all"), everything, sum(pooled.pair_images.values()))
    return AgreementSummary(
        metric=metric,
        class_indices=tuple(schema.indices),
        class_names=schema.names,
        pairs=pairs,
        classes=_class_figures(schema, overall),
        images=tuple(images),
        days=_day_figures(pooled),
        overall=overall,
    )
