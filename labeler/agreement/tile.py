"""Agreement of two annotators on one tile: the scalar of the threshold, boundary F.

:func:`tile_agreement` is the number a tile is contested on (Cohen's kappa or mean IoU
of the pixels both annotators labelled); :func:`boundary_f_score` looks at the region
borders only, where two masks that agree inside can still drift apart.
"""

from __future__ import annotations

import math

import numpy as np
from scipy import ndimage

from labeler.agreement.kappa import cohen_kappa
from labeler.classes import UNLABELLED
from labeler.metrics import as_label_array, confusion_matrix, mean_iou

__all__ = ["AGREEMENT_METRICS", "tile_agreement", "boundary_f_score"]

#: The scalars a tile's agreement can be measured with (setting ``agreement.metric``).
AGREEMENT_METRICS = ("kappa", "iou")


def _check_metric(metric: object) -> str:
    """``metric`` if it is one of :data:`AGREEMENT_METRICS`, else a ``ValueError``."""
    if metric not in AGREEMENT_METRICS:
        raise ValueError(f"metric: expected 'kappa' or 'iou', got {metric!r}")
    return str(metric)


def _inner_boundary(region: np.ndarray) -> np.ndarray:
    """Pixels of ``region`` with a 4-neighbour outside it; the image edge is not a border."""
    padded = np.pad(region, 1, mode="edge")
    inside = (
        padded[:-2, 1:-1] & padded[2:, 1:-1] & padded[1:-1, :-2] & padded[1:-1, 2:]
    )
    return region & ~inside


def boundary_f_score(
    mask_true: np.ndarray,
    mask_test: np.ndarray,
    *,
    class_index: int,
    tolerance_px: float = 2,
) -> tuple[float, float, float]:
    """Boundary precision, recall and F score of one class's regions.

    Parameters
    ----------
    mask_true, mask_test : ndarray, shape (H, W), integer
        Reference and compared masks.
    class_index : int
        The class whose region border is compared.
    tolerance_px : float
        A boundary pixel matches when the other mask's boundary lies within this
        Euclidean distance (pixels), inclusive.

    Returns
    -------
    precision : float
        Share of ``mask_test`` boundary pixels within tolerance of the reference border.
    recall : float
        Share of ``mask_true`` boundary pixels within tolerance of the tested border.
    f : float
        Harmonic mean ``2 P R / (P + R)`` (0 when both are 0).

    Notes
    -----
    A boundary pixel is a pixel of the class with a 4-neighbour of another value
    (unlabelled counts as another value). The image edge is not a border: a region
    cut by the tile edge has no boundary there (common practice, no source).
    Edge cases: both boundaries empty -> (1, 1, 1), nothing to miss; only the
    reference empty -> precision 0, recall 1, F 0; only the tested one empty ->
    precision 1, recall 0, F 0. Masks that agree inside but whose edges drift by more
    than the tolerance score low here while their IoU stays high.
    """
    a = as_label_array(mask_true, name="mask_true")
    b = as_label_array(mask_test, name="mask_test")
    if a.ndim != 2:
        raise ValueError(f"mask_true: expected a 2-D (H, W) mask, got shape {a.shape}")
    if a.shape != b.shape:
        raise ValueError(
            f"mask_test: expected shape {a.shape} like mask_true, got {b.shape}; "
            "pass masks of the same tile"
        )
    if not np.isfinite(tolerance_px) or tolerance_px < 0:
        raise ValueError(f"tolerance_px: expected a distance >= 0 pixels, got {tolerance_px}")
    bt = _inner_boundary(a == class_index)
    bs = _inner_boundary(b == class_index)
    nt, ns = int(bt.sum()), int(bs.sum())
    if nt == 0 and ns == 0:
        return 1.0, 1.0, 1.0
    if nt == 0:
        return 0.0, 1.0, 0.0
    if ns == 0:
        return 1.0, 0.0, 0.0
    dist_to_true = ndimage.distance_transform_edt(~bt)
    dist_to_test = ndimage.distance_transform_edt(~bs)
    precision = float(np.count_nonzero(dist_to_true[bs] <= tolerance_px) / ns)
    recall = float(np.count_nonzero(dist_to_test[bt] <= tolerance_px) / nt)
    f = 0.0 if precision + recall == 0 else 2 * precision * recall / (precision + recall)
    return precision, recall, float(f)


def tile_agreement(
    mask_a: np.ndarray,
    mask_b: np.ndarray,
    *,
    n_classes: int,
    metric: str = "kappa",
    ignore: int | None = UNLABELLED,
) -> float:
    """Agreement of two annotators on one tile: the scalar compared with the threshold.

    Parameters
    ----------
    mask_a, mask_b : ndarray, shape (H, W), integer
        The two annotators' masks of the same tile.
    n_classes : int
        Number of classes K; valid values are 0..K-1.
    metric : {"kappa", "iou"}
        ``"kappa"``: Cohen's kappa on the pixels both labelled; ``"iou"``: mean IoU of
        the classes present on either side.
    ignore : int or None
        Unlabelled value (default 255); a pixel is compared only where both labelled it.

    Returns
    -------
    agreement : float
        ``nan`` when the two share no labelled pixel: there is nothing to compare and
        the caller must not contest the tile on it. 1.0 when both mark every common
        pixel with the same single class.
    """
    _check_metric(metric)
    cm = confusion_matrix(mask_a, mask_b, n_classes=n_classes, ignore=ignore)
    if cm.sum() == 0:
        return math.nan
    return cohen_kappa(cm) if metric == "kappa" else mean_iou(cm)
