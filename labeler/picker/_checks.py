"""Input checks shared by the picker's modules (private to :mod:`labeler.picker`).

Each check names the parameter (or pool field) in its message, says what was expected
and what was got, and how to fix it.
"""

from __future__ import annotations

import math

import numpy as np

__all__ = [
    "TINY",
    "SUM_ATOL",
    "as_probs",
    "check_probs",
    "check_simplex",
    "check_samples",
    "check_int",
    "check_vector",
    "check_fractions",
    "check_agreement_range",
    "as_features",
    "index_set",
]

#: Floor of probabilities inside logarithms and of medians in ratios.
TINY = 1e-12
#: Tolerance of a probability sum (and of a negative probability) before it is an error.
SUM_ATOL = 1e-3


def as_probs(probs: np.ndarray, name: str) -> np.ndarray:
    """``probs`` as float64 with at least one axis of length >= 1 (the class axis)."""
    p = np.asarray(probs, dtype=np.float64)
    if p.ndim < 1 or p.shape[0] < 1:
        raise ValueError(f"{name}: expected an array with a class axis, got shape {p.shape}")
    return p


def check_probs(probs: np.ndarray, name: str) -> np.ndarray:
    """``probs`` as float64 (K, H, W): finite, non-negative, summing to 1 over K."""
    p = np.asarray(probs)
    if p.ndim != 3 or min(p.shape) < 1:
        raise ValueError(
            f"{name}: expected class probabilities of shape (K, H, W) with K, H, W >= 1, "
            f"got shape {p.shape}; pass one tile's softmax output"
        )
    p = p.astype(np.float64, copy=False)
    check_simplex(p, name, axis=0)
    return p


def check_simplex(p: np.ndarray, name: str, *, axis: int) -> None:
    """Raise unless ``p`` is finite, >= 0 and sums to 1 along ``axis`` (within SUM_ATOL)."""
    if not np.isfinite(p).all():
        raise ValueError(f"{name}: expected finite probabilities, got NaN or infinity")
    if p.min() < -SUM_ATOL:
        raise ValueError(
            f"{name}: expected probabilities >= 0, got a minimum of {p.min():.6g}; "
            "pass softmax outputs, not logits"
        )
    sums = p.sum(axis=axis)
    off = np.abs(sums - 1.0) > SUM_ATOL
    if off.any():
        raise ValueError(
            f"{name}: expected probabilities summing to 1 over the class axis (within "
            f"{SUM_ATOL:g}), got sums from {sums.min():.6g} to {sums.max():.6g} at "
            f"{int(off.sum())} pixel(s); pass softmax outputs, not logits"
        )


def check_samples(samples: np.ndarray, probs_shape: tuple[int, ...]) -> np.ndarray:
    """Dropout passes as float64 (T, K, H, W) matching ``probs_shape`` (K, H, W)."""
    s = np.asarray(samples)
    if s.ndim != 4 or s.shape[0] < 1 or s.shape[1:] != probs_shape:
        raise ValueError(
            f"samples: expected dropout samples of shape (T, {', '.join(map(str, probs_shape))})"
            f" with T >= 1 (T, then the shape of probs), got {s.shape}; pass the passes of "
            "the same tile"
        )
    s = s.astype(np.float64, copy=False)
    check_simplex(s, "samples", axis=1)
    return s


def check_int(value: object, name: str, *, minimum: int) -> int:
    """``value`` as an int >= ``minimum`` (bool and float are refused)."""
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)):
        raise TypeError(f"{name}: expected an integer, got {value!r} ({type(value).__name__})")
    if value < minimum:
        raise ValueError(f"{name}: expected an integer >= {minimum}, got {value}")
    return int(value)


def check_vector(values: object, name: str, n: int, *, allow_nan: bool = False) -> np.ndarray:
    """``values`` as float64 of shape (n,), finite (or NaN when ``allow_nan``)."""
    v = np.asarray(values, dtype=np.float64)
    if v.shape != (n,):
        raise ValueError(f"{name}: expected shape ({n},), one value per tile, got {v.shape}")
    bad = ~np.isfinite(v)
    if allow_nan:
        bad &= ~np.isnan(v)
    if bad.any():
        rows = np.flatnonzero(bad)[:5].tolist()
        raise ValueError(
            f"{name}: expected finite values{' or NaN' if allow_nan else ''}, got "
            f"{v[bad][0]} at row(s) {rows}{' ...' if bad.sum() > 5 else ''}"
        )
    return v


def check_fractions(fractions: object, name: str) -> np.ndarray:
    """Class fractions as float64 (N, K), finite and >= 0."""
    f = np.asarray(fractions, dtype=np.float64)
    if f.ndim != 2 or f.shape[1] < 1:
        raise ValueError(
            f"{name}: expected class fractions of shape (N, K) with K >= 1, got {f.shape}"
        )
    if not np.isfinite(f).all() or (f < 0).any():
        raise ValueError(f"{name}: expected finite fractions >= 0, got NaN, infinity or < 0")
    return f


def check_agreement_range(a: np.ndarray, name: str) -> None:
    """Raise unless every known (not NaN) agreement lies in [-1, 1]."""
    known = ~np.isnan(a)
    bad = known & ~((a >= -1.0 - 1e-9) & (a <= 1.0 + 1e-9))
    if bad.any():
        rows = np.flatnonzero(bad)[:5].tolist()
        raise ValueError(
            f"{name}: expected kappa or IoU values in [-1, 1] or NaN (not overlapped), got "
            f"{a[bad][0]} at row(s) {rows}"
        )


def as_features(features: object, name: str = "features") -> np.ndarray:
    """Embeddings as C-contiguous float32 (N, D), finite, D >= 1."""
    x = np.asarray(features)
    if x.ndim != 2 or x.shape[1] < 1:
        raise ValueError(
            f"{name}: expected embeddings of shape (N, D) with D >= 1, got {x.shape}"
        )
    if not (np.issubdtype(x.dtype, np.floating) or np.issubdtype(x.dtype, np.integer)):
        raise ValueError(f"{name}: expected real numbers, got dtype {x.dtype}")
    x = np.ascontiguousarray(x, dtype=np.float32)
    if not math.isfinite(float(x.sum(dtype=np.float64))):
        bad = np.flatnonzero(~np.isfinite(x).all(axis=1))
        raise ValueError(
            f"{name}: expected finite embeddings, got NaN or infinity in {bad.size} row(s), "
            f"first {bad[:5].tolist()}; re-run the encoder on those tiles or leave them out"
        )
    return x


def index_set(spec: object, n: int, name: str) -> np.ndarray:
    """Sorted unique row indices from ``None``, a bool mask (N,) or an integer array."""
    if spec is None:
        return np.zeros(0, np.int64)
    a = np.asarray(spec)
    if a.dtype == bool:
        if a.shape != (n,):
            raise ValueError(f"{name}: expected a boolean mask of shape ({n},), got {a.shape}")
        return np.flatnonzero(a).astype(np.int64)
    if a.size == 0:
        return np.zeros(0, np.int64)
    if not np.issubdtype(a.dtype, np.integer) or a.ndim != 1:
        raise ValueError(
            f"{name}: expected a 1-D array of row indices or a boolean mask of shape ({n},), "
            f"got dtype {a.dtype} shape {a.shape}"
        )
    if a.min() < 0 or a.max() >= n:
        raise ValueError(
            f"{name}: expected row indices in 0..{n - 1}, got values from {a.min()} to {a.max()}"
        )
    return np.unique(a).astype(np.int64)
