"""The training loss of the proposal head: partial cross-entropy with class weights.

Partial cross-entropy (``ignore_index=255``): pixels a weak label leaves open contribute
nothing, so full masks and weak labels mix freely (Tang et al. 2018, "Normalized cut loss
for weakly-supervised CNN segmentation", CVPR). Class weights counter imbalance: with
``f_k`` the share of class k among the labelled training pixels,
``w_k = f_k ** -0.5 / sum_j f_j ** 0.5`` (inverse square root of the frequency, scaled so
that the mean weight per labelled pixel is 1; common practice, no source), clipped to
``[0.1, 10]``; classes absent from training get weight 1 (it never applies).
"""

from __future__ import annotations

import numpy as np
import torch
import torch.nn.functional as F

from labeler.classes import UNLABELLED

__all__ = ["class_weights", "partial_cross_entropy"]


def class_weights(counts: np.ndarray, *, clip: tuple[float, float] = (0.1, 10.0)) -> np.ndarray:
    """Inverse square-root frequency weights (see the module docstring).

    Parameters
    ----------
    counts : ndarray, shape (K,)
        Labelled pixels per class.
    clip : (float, float)
        Smallest and largest weight of a class with pixels.

    Returns
    -------
    weights : ndarray, shape (K,), float64
        1 for classes with no pixel; all ones when nothing is labelled.
    """
    c = np.asarray(counts, np.float64)
    out = np.ones(c.shape, np.float64)
    total = c.sum()
    if total <= 0:
        return out
    f = c / total
    present = f > 0
    out[present] = f[present] ** -0.5 / np.sum(np.sqrt(f[present]))
    out[present] = np.clip(out[present], *clip)
    return out


def partial_cross_entropy(
    logits: torch.Tensor, target: torch.Tensor, weight: torch.Tensor
) -> torch.Tensor | None:
    """Weighted cross-entropy over the labelled pixels only.

    Parameters
    ----------
    logits : Tensor, shape (B, K, H, W)
    target : Tensor, shape (B, H, W), int64
        Head channel per pixel, 255 unlabelled (ignored).
    weight : Tensor, shape (K,)
        Class weights.

    Returns
    -------
    loss : scalar Tensor, or None when no pixel is labelled
        ``sum_i w[y_i] * -log softmax(x_i)[y_i] / sum_i w[y_i]`` over labelled pixels i.
    """
    if not bool((target != UNLABELLED).any()):
        return None
    return F.cross_entropy(logits, target, weight=weight, ignore_index=UNLABELLED)
