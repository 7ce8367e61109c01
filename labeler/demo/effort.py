"""Annotation effort of simulated sessions: tile IoU and the number of actions to IoU 0.90.

NoC@90 ("number of clicks" to reach an IoU of 0.90) is the effort measure of the
interactive segmentation literature since Xu et al. (2016, "Deep Interactive Object
Selection", CVPR): a simulated user acts until the IoU with the truth reaches 0.90, at
most 20 times, and a session that never gets there counts as 20. Here an action is one
counted editor action (:attr:`labeler.editor.state.EditorState.actions`: a fill click, a
stroke, a refine, an undo), the same count the product records for every save, and the
IoU is :func:`tile_iou`. A tile whose starting mask is already good enough costs 0.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from scipy import ndimage as ndi

from labeler.classes import UNLABELLED
from labeler.metrics import confusion_matrix, iou_per_class

__all__ = [
    "NOC_THRESHOLD",
    "NOC_CAP",
    "tile_iou",
    "region_fix_bound",
    "noc_at",
    "NocSummary",
    "summarise_noc",
]

#: IoU a session must reach.
NOC_THRESHOLD = 0.90
#: Most actions counted per tile (a session that does not reach the IoU counts this many).
NOC_CAP = 20


def tile_iou(truth: np.ndarray, mask: np.ndarray, *, n_classes: int) -> float:
    """Mean IoU of a tile's mask against its truth, over the classes present in the truth.

    The interactive protocol (Xu et al. 2016) scores one binary object; a tile holds several
    classes, so the tile's score is the per-class IoU (Jaccard index, TP / (TP + FP + FN)
    from :func:`labeler.metrics.iou_per_class`) averaged over the classes present in the
    tile's truth: the per-image class-averaged Jaccard of Csurka, Larlus & Perronnin (2013,
    "What is a good evaluation measure for semantic segmentation?", BMVC), who argue for
    per-image scores. A class only the mask holds adds no term of its own (it would count
    0 and cap the tile at (K-1)/K for one stray pixel); its pixels still count as false
    negatives of the truth classes they cover. Truth pixels of 255 (unlabelled) are left
    out, as the reference implementations of the protocol leave out the ignore label; a
    mask pixel of 255 where the truth has a class counts as wrong (it labels nothing).

    Parameters
    ----------
    truth : ndarray, shape (H, W), uint8
        Class indices 0..n_classes-1, or 255.
    mask : ndarray, shape (H, W), uint8
        Class indices 0..n_classes-1, or 255.
    n_classes : int
        Number of classes K.

    Returns
    -------
    iou : float
        In 0..1; 1.0 when the truth holds no labelled pixel.
    """
    t = np.asarray(truth)
    m = np.asarray(mask)
    if t.shape != m.shape or t.ndim != 2:
        raise ValueError(
            f"mask: expected a 2-D mask of the truth's shape {t.shape}, got shape {m.shape}"
        )
    labelled = t != UNLABELLED
    if not labelled.any():
        return 1.0
    # an unlabelled mask pixel becomes an extra class K that no truth pixel holds: a
    # false negative of its truth class; class K itself stays out of the mean
    m = np.where(m == UNLABELLED, n_classes, m)
    cm = confusion_matrix(t[labelled], m[labelled], n_classes=n_classes + 1, ignore=None)
    iou = iou_per_class(cm)[:n_classes]
    present = cm[:n_classes].sum(axis=1) > 0  # classes of the truth
    return float(iou[present].mean())


def region_fix_bound(
    truth: np.ndarray, start: np.ndarray, *, n_classes: int, n_regions: int = NOC_CAP
) -> float:
    """Tile IoU after the ``n_regions`` largest error regions are set right, one by one.

    What the protocol's region-by-region correction reaches at best when every action
    sets its whole error region right and nothing else (error regions as in
    :func:`labeler.demo.clicks.next_click`: 4-connected wrong pixels of one truth class,
    largest first). A tile whose errors lie in many thin slivers along class boundaries
    stays far below 0.90 even so; a single action that fixes several regions at once (a
    fill, a refine, an on-tile re-fit) can do better.

    Parameters
    ----------
    truth : ndarray, shape (H, W), uint8
        Class indices 0..n_classes-1, or 255 (never an error).
    start : ndarray, shape (H, W), uint8
        The starting mask.
    n_classes : int
        Number of classes K.
    n_regions : int
        Regions set right, at least 0.

    Returns
    -------
    iou : float
        :func:`tile_iou` of the corrected mask.
    """
    t = np.asarray(truth)
    m = np.asarray(start).copy()
    if t.shape != m.shape or t.ndim != 2:
        raise ValueError(
            f"start: expected a 2-D mask of the truth's shape {t.shape}, got shape {m.shape}"
        )
    if n_regions < 0:
        raise ValueError(f"n_regions: expected at least 0, got {n_regions}")
    error = (m != t) & (t != UNLABELLED)
    four = ndi.generate_binary_structure(2, 1)
    labels = np.zeros(t.shape, np.int64)
    n = 0
    for cls in np.unique(t[error]):
        lab, k = ndi.label(error & (t == cls), structure=four)
        labels[lab > 0] = lab[lab > 0] + n
        n += k
    sizes = np.bincount(labels.ravel(), minlength=n + 1)[1:]
    # ties as next_click: the region whose first pixel comes first in row-major order
    flat = np.arange(labels.size).reshape(labels.shape)
    first = np.asarray(ndi.minimum(flat, labels, np.arange(1, n + 1)), np.int64) if n else []
    order = np.lexsort((first, -sizes))[:n_regions] + 1 if n else np.array([], np.int64)
    fix = np.isin(labels, order)
    m[fix] = t[fix]
    return tile_iou(t, m, n_classes=n_classes)


def noc_at(
    ious: Sequence[float], *, threshold: float = NOC_THRESHOLD, cap: int = NOC_CAP
) -> int:
    """Actions needed to reach ``threshold``: the first ``n`` with ``ious[n] >= threshold``.

    Parameters
    ----------
    ious : sequence of float
        The tile IoU after 0, 1, 2, ... actions (``ious[0]``: the starting mask).
    threshold : float
        IoU to reach, in 0..1.
    cap : int
        Most actions counted; a session that does not reach ``threshold`` within ``cap``
        actions counts ``cap``.

    Returns
    -------
    n : int
        In 0..cap.
    """
    if not 0.0 <= threshold <= 1.0:
        raise ValueError(f"threshold: expected an IoU in 0..1, got {threshold}")
    if cap < 1:
        raise ValueError(f"cap: expected at least 1 action, got {cap}")
    if len(ious) == 0:
        raise ValueError("ious: expected the IoU before the first action at least, got none")
    for n, value in enumerate(ious[: cap + 1]):
        if value >= threshold:
            return n
    return cap


@dataclass(frozen=True)
class NocSummary:
    """NoC figures over a set of tiles.

    Attributes
    ----------
    mean : float
        Mean actions per tile (capped tiles count ``cap``).
    n_tiles : int
    n_capped : int
        Tiles counted ``cap`` actions: they reached the threshold only at the cap, or
        never.
    n_unchanged : int
        Tiles good enough before any action (0 actions).
    cap : int
    """

    mean: float
    n_tiles: int
    n_capped: int
    n_unchanged: int
    cap: int


def summarise_noc(
    runs: Sequence[Sequence[float]], *, threshold: float = NOC_THRESHOLD, cap: int = NOC_CAP
) -> NocSummary:
    """:func:`noc_at` over several tiles' IoU traces, summarised.

    Parameters
    ----------
    runs : sequence of sequences of float
        One IoU trace per tile (see :func:`noc_at`); at least one.
    threshold, cap
        As :func:`noc_at`.

    Returns
    -------
    NocSummary
    """
    if len(runs) == 0:
        raise ValueError("runs: expected the IoU trace of at least one tile, got none")
    counts = np.array([noc_at(r, threshold=threshold, cap=cap) for r in runs])
    return NocSummary(
        mean=float(counts.mean()),
        n_tiles=int(counts.size),
        n_capped=int((counts == cap).sum()),
        n_unchanged=int((counts == 0).sum()),
        cap=int(cap),
    )
