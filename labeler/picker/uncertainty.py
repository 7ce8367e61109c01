"""Per-pixel uncertainty of class probabilities: entropy, margin, least confidence, BALD.

``probs`` arrays hold probabilities along one class axis (default axis 0, shape
``(K, ...)``); dropout samples add a sample axis in front (``(T, K, ...)``). Natural
logarithms throughout (entropy in nats).

Sources: entropy, margin and least confidence are the classic uncertainty-sampling
scores; BALD is the mutual information of Houlsby et al. (2011) with MC-dropout samples
(Gal, Islam & Ghahramani 2017).

References
----------
Houlsby, N., Huszar, F., Ghahramani, Z. & Lengyel, M. (2011). Bayesian active learning
for classification and preference learning. arXiv:1112.5745.
Gal, Y., Islam, R. & Ghahramani, Z. (2017). Deep Bayesian active learning with image
data. ICML.
"""

from __future__ import annotations

import numpy as np

from labeler.picker._checks import TINY, as_probs, check_int, check_probs, check_samples
from labeler.settings import UNCERTAINTY_MEASURES

__all__ = [
    "UNCERTAINTY_MEASURES",
    "pixel_entropy",
    "pixel_margin",
    "pixel_least_confidence",
    "pixel_bald",
    "uncertainty_maps",
]


def pixel_entropy(probs: np.ndarray, *, axis: int = 0) -> np.ndarray:
    """Shannon entropy ``H = -sum_k p_k log p_k`` in nats.

    Parameters
    ----------
    probs : ndarray, shape (K, ...)
        Class probabilities along ``axis``; 0 log 0 counts as 0.
    axis : int
        The class axis.

    Returns
    -------
    entropy : ndarray, shape (...)
        0 for a certain pixel, ``log K`` for a uniform one.
    """
    p = as_probs(probs, "probs")
    return -np.sum(p * np.log(np.clip(p, TINY, None)), axis=axis)


def pixel_margin(probs: np.ndarray, *, axis: int = 0) -> np.ndarray:
    """Margin ``p(1) - p(2)`` between the two largest probabilities (small = uncertain).

    Parameters
    ----------
    probs : ndarray, shape (K, ...)
        Class probabilities along ``axis``.
    axis : int
        The class axis.

    Returns
    -------
    margin : ndarray, shape (...)
        In [0, 1]; with one class (K = 1) the margin is that class's probability.
    """
    p = as_probs(probs, "probs")
    if p.shape[axis] == 1:
        return np.take(p, 0, axis=axis)
    top2 = -np.partition(-p, 1, axis=axis)
    return np.take(top2, 0, axis=axis) - np.take(top2, 1, axis=axis)


def pixel_least_confidence(probs: np.ndarray, *, axis: int = 0) -> np.ndarray:
    """Least confidence ``1 - max_k p_k`` (large = uncertain).

    Parameters
    ----------
    probs : ndarray, shape (K, ...)
        Class probabilities along ``axis``.
    axis : int
        The class axis.

    Returns
    -------
    least_confidence : ndarray, shape (...)
        In [0, 1 - 1/K].
    """
    p = as_probs(probs, "probs")
    return 1.0 - np.max(p, axis=axis)


def pixel_bald(samples: np.ndarray, *, sample_axis: int = 0, class_axis: int = 1) -> np.ndarray:
    """BALD mutual information ``H[mean_t p_t] - mean_t H[p_t]`` (Houlsby et al. 2011).

    Parameters
    ----------
    samples : ndarray, shape (T, K, ...)
        Class probabilities of T stochastic (MC-dropout) passes.
    sample_axis, class_axis : int
        Axes of the samples and of the classes (in the input's numbering).

    Returns
    -------
    bald : ndarray, shape (...)
        Non-negative (clipped at 0 against rounding); 0 when all passes agree.
    """
    s = as_probs(samples, "samples")
    if s.ndim < 2:
        raise ValueError(
            f"samples: expected shape (T, K, ...) with a sample and a class axis, got {s.shape}"
        )
    s = np.moveaxis(s, (sample_axis, class_axis), (0, 1))
    mean = s.mean(axis=0)
    total = pixel_entropy(mean, axis=0)
    expected = pixel_entropy(s, axis=1).mean(axis=0)
    return np.clip(total - expected, 0.0, None)


def _block_mean(a: np.ndarray, factor: int) -> np.ndarray:
    """Mean over ``factor x factor`` blocks of the last two axes (edge blocks may be smaller)."""
    if factor == 1:
        return a
    h, w = a.shape[-2:]
    rows = np.arange(0, h, factor)
    cols = np.arange(0, w, factor)
    total = np.add.reduceat(np.add.reduceat(a, rows, axis=-2), cols, axis=-1)
    n_rows = np.diff(np.append(rows, h))
    n_cols = np.diff(np.append(cols, w))
    return total / (n_rows[:, None] * n_cols[None, :])


def uncertainty_maps(
    probs: np.ndarray, *, samples: np.ndarray | None = None, factor: int = 1
) -> np.ndarray:
    """Stack of per-pixel uncertainty maps of one tile, optionally block-averaged.

    Parameters
    ----------
    probs : ndarray, shape (K, H, W)
        Mean class probabilities per pixel (sum 1 over K).
    samples : ndarray, shape (T, K, H, W), optional
        MC-dropout passes; without them the BALD channel is NaN.
    factor : int
        Block size of the downsampling (mean over ``factor x factor`` pixels); edge blocks
        of a size that ``factor`` does not divide are averaged over the pixels they hold.

    Returns
    -------
    maps : ndarray, shape (M, ceil(H / factor), ceil(W / factor)), float32
        M = 4 channels in :data:`UNCERTAINTY_MEASURES` order: entropy (nats), margin, least
        confidence, BALD.
    """
    p = check_probs(probs, "probs")
    factor = check_int(factor, "factor", minimum=1)
    _, h, w = p.shape
    bald = np.full((h, w), np.nan)
    if samples is not None:
        bald = pixel_bald(check_samples(samples, p.shape))
    per_pixel = {
        "entropy": pixel_entropy(p),
        "margin": pixel_margin(p),
        "least_confidence": pixel_least_confidence(p),
        "bald": bald,
    }
    stack = np.stack([per_pixel[name] for name in UNCERTAINTY_MEASURES])
    return _block_mean(stack, factor).astype(np.float32)
