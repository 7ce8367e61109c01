"""Active-learning scores and batch selection (numpy only).

Per-pixel uncertainty of class probabilities. ``probs`` arrays hold probabilities along
one class axis (default axis 0, shape ``(K, ...)``); dropout samples add a sample axis in
front (``(T, K, ...)``). Natural logarithms throughout (entropy in nats).
"""

from __future__ import annotations

import numpy as np

__all__ = [
    "pixel_entropy",
    "pixel_margin",
    "pixel_least_confidence",
    "pixel_bald",
]

_TINY = 1e-12


def _as_probs(probs: np.ndarray, name: str) -> np.ndarray:
    p = np.asarray(probs, dtype=np.float64)
    if p.ndim < 1 or p.shape[0] < 1:
        raise ValueError(f"{name}: expected an array with a class axis, got shape {p.shape}")
    return p


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
    p = _as_probs(probs, "probs")
    return -np.sum(p * np.log(np.clip(p, _TINY, None)), axis=axis)


def pixel_margin(probs: np.ndarray, *, axis: int = 0) -> np.ndarray:
    """Margin ``p(1) - p(2)`` between the two largest probabilities (small = uncertain).

    With one class the margin is that class's probability.
    """
    p = _as_probs(probs, "probs")
    if p.shape[axis] == 1:
        return np.take(p, 0, axis=axis)
    top2 = -np.partition(-p, 1, axis=axis)
    return np.take(top2, 0, axis=axis) - np.take(top2, 1, axis=axis)


def pixel_least_confidence(probs: np.ndarray, *, axis: int = 0) -> np.ndarray:
    """Least confidence ``1 - max_k p_k`` (large = uncertain)."""
    p = _as_probs(probs, "probs")
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
    s = _as_probs(samples, "samples")
    if s.ndim < 2:
        raise ValueError(
            f"samples: expected shape (T, K, ...) with a sample and a class axis, got {s.shape}"
        )
    s = np.moveaxis(s, (sample_axis, class_axis), (0, 1))
    mean = s.mean(axis=0)
    total = pixel_entropy(mean, axis=0)
    expected = pixel_entropy(s, axis=1).mean(axis=0)
    return np.clip(total - expected, 0.0, None)
