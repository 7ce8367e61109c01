"""Validation of head training and the early-stopping rule it drives.

A held-out slice of the labelled tiles is scored after every epoch (:func:`validate`):
the weighted partial cross-entropy of the head's output (the refined logits for a
refining head given the pixels, else the bilinearly upsampled coarse logits), combined
exactly over batches as a weighted sum over the weight total, and a confusion matrix
of the labelled pixels for per-class IoU (:func:`iou_from`).

The stopping rule (:func:`early_stopping`) is a pure function of the validation losses
of the epochs run so far: the best epoch is the first one with the lowest loss (an
epoch counts as better only when its loss is strictly lower; NaN never is), and
training stops once ``patience`` epochs in a row have not lowered it. This is the
early-stopping meta-algorithm with a patience of Goodfellow, Bengio & Courville,
*Deep Learning* (MIT Press 2016), section 7.8, algorithm 7.1 (from memory), evaluated
after every epoch; the caller keeps the head's state of the best epoch.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np
import torch
import torch.nn.functional as F

from labeler.classes import UNLABELLED
from labeler.metrics import confusion_matrix, iou_per_class
from labeler.model.head import HeadConfig, ProposalHead, features_to_tensors
from labeler.model.refine import pixel_input

__all__ = ["early_stopping", "validate", "iou_from", "VALIDATION_BATCH"]

#: Tiles per forward pass during validation.
VALIDATION_BATCH = 8


def early_stopping(val_losses: Sequence[float], *, patience: int) -> tuple[int, bool]:
    """Apply the stopping rule to the validation losses of the epochs run so far.

    Parameters
    ----------
    val_losses : sequence of float, shape (E,)
        Validation loss after each epoch, epoch 1 first.
    patience : int
        Epochs without a strictly lower loss after which training stops (at least 1).

    Returns
    -------
    best_epoch : int
        1-based epoch of the lowest loss (the first of equal lowest losses); 0 when no
        loss is a number.
    stop : bool
        True when the last ``patience`` epochs have not lowered the best loss.

    Raises
    ------
    ValueError
        When ``patience`` is below 1.
    """
    if patience < 1:
        raise ValueError(f"patience: expected at least 1 epoch, got {patience}")
    best, best_epoch, stale = math.inf, 0, 0
    for epoch, loss in enumerate(val_losses, start=1):
        if loss < best:  # False for NaN
            best, best_epoch, stale = loss, epoch, 0
        else:
            stale += 1
    return best_epoch, stale >= patience


def validate(
    head: ProposalHead,
    features: Sequence,
    channel_masks: Sequence[np.ndarray],
    groups: dict[tuple[int, int], list[int]],
    weight: torch.Tensor,
    cfg: HeadConfig,
    *,
    images: Sequence[np.ndarray] | None = None,
    tail: torch.nn.Module | None = None,
) -> tuple[float, np.ndarray | None]:
    """Validation loss and confusion matrix of the held-out tiles (head left in eval mode).

    Parameters
    ----------
    head : ProposalHead
        The head being trained.
    features : sequence of tuples of 4 ndarray
        Encoder features per tile number (entries of non-validation tiles are not read).
    channel_masks : sequence of ndarray, each (H, W) uint8
        Truth per tile number as head channels, 255 unlabelled.
    groups : dict
        Validation tile numbers by tile shape ``(H, W)``; empty without validation.
    weight : Tensor, shape (K,)
        Class weights of the loss.
    cfg : HeadConfig
        The head's configuration (number of classes, refinement).
    images : sequence of ndarray, each (H, W, 3) uint8, optional
        The tiles' pixels; a refining head is scored on its refined output with them.
    tail : EncoderTail, optional
        Fine-tuned encoder stages the features pass through first
        (:mod:`labeler.model.tail`; left in the mode it is in).

    Returns
    -------
    loss : float
        Weighted partial cross-entropy over every labelled validation pixel; NaN without
        validation tiles or labelled pixels.
    cm : ndarray, shape (K, K), int64, or None
        Confusion matrix (rows truth, columns prediction) of the labelled pixels; None
        without validation tiles.
    """
    if not groups:
        return math.nan, None
    head.eval()
    k = cfg.n_classes
    cm = np.zeros((k, k), np.int64)
    loss_sum, weight_sum = 0.0, 0.0
    with torch.no_grad():
        for shape, members in groups.items():
            for start in range(0, len(members), VALIDATION_BATCH):
                batch = members[start : start + VALIDATION_BATCH]
                levels = features_to_tensors([features[i] for i in batch])
                if tail is not None:
                    levels = tail(levels)
                target = torch.from_numpy(np.stack([channel_masks[i] for i in batch])).long()
                pixels = None
                if cfg.refines and images is not None:
                    pixels = pixel_input(np.stack([np.asarray(images[i]) for i in batch]))
                logits = head(levels, size=shape, pixels=pixels)
                lab = target != UNLABELLED
                if bool(lab.any()):
                    # weighted sum and weight total, so batches combine exactly
                    per = F.cross_entropy(
                        logits, target, weight=weight, ignore_index=UNLABELLED, reduction="sum"
                    )
                    loss_sum += float(per)
                    weight_sum += float(weight[target[lab]].sum())
                pred = logits.argmax(dim=1).to(torch.uint8).numpy()
                for t, p in zip(target.to(torch.uint8).numpy(), pred, strict=True):
                    cm += confusion_matrix(t, p, n_classes=k, ignore=UNLABELLED)
    return (loss_sum / weight_sum if weight_sum else math.nan), cm


def iou_from(cm: np.ndarray | None) -> np.ndarray:
    """Per-class IoU of a validation confusion matrix.

    Parameters
    ----------
    cm : ndarray, shape (K, K), or None
        Rows truth, columns prediction.

    Returns
    -------
    iou : ndarray, shape (K,), float64
        NaN for classes absent from the validation truth; empty for ``cm=None``.
    """
    if cm is None:
        return np.full(0, np.nan)
    iou = iou_per_class(cm)
    iou[cm.sum(axis=1) == 0] = np.nan  # absent from the validation truth
    return iou
