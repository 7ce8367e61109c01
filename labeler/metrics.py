"""Pixel metrics of class-index masks, shared by training and agreement.

Pure numpy: every function takes and returns arrays (or plain numbers and text); nothing
here opens a file or imports torch or textual.

Masks are integer class-index arrays (``uint8`` in the project) in which the value
``ignore`` (default 255, :data:`labeler.classes.UNLABELLED`) marks a pixel left
unlabelled. Metrics skip such pixels. Confusion matrices follow the usual layout:
``cm[i, j]`` counts pixels of class ``i`` in the first (reference) mask and class ``j``
in the second.

A ratio whose denominator is 0 because nothing was compared is ``nan``.

The validation helpers (:func:`check_n_classes`, :func:`check_ignore`,
:func:`as_label_array`, :func:`check_label_values`, :func:`as_confusion`) hold the
contract of a class-index mask in one place; :mod:`labeler.agreement` uses them too.

References
----------
Long, J., Shelhamer, E. & Darrell, T. (2015). Fully convolutional networks for semantic
segmentation. CVPR.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping, Sequence

import numpy as np

from labeler.classes import UNLABELLED

__all__ = [
    "CHUNK_PIXELS",
    "check_n_classes",
    "check_ignore",
    "as_label_array",
    "check_label_values",
    "as_confusion",
    "confusion_matrix",
    "pixel_accuracy",
    "iou_per_class",
    "dice_per_class",
    "mean_iou",
    "class_fractions",
    "format_iou",
]

#: Pixels handled per step by the chunked loops (bounds the size of temporaries).
CHUNK_PIXELS = 1 << 20


# ---------------------------------------------------------------------------------------
# validation
# ---------------------------------------------------------------------------------------
def check_n_classes(n_classes: object) -> int:
    """``n_classes`` as an int in 1..4096.

    Parameters
    ----------
    n_classes : int
        Number of classes K.

    Returns
    -------
    k : int

    Raises
    ------
    TypeError
        Not an integer (``bool`` is refused).
    ValueError
        Outside 1..4096.
    """
    if isinstance(n_classes, bool) or not isinstance(n_classes, int | np.integer):
        raise TypeError(f"n_classes: expected an int, got {type(n_classes).__name__}")
    k = int(n_classes)
    if not 1 <= k <= 4096:
        raise ValueError(f"n_classes: expected 1..4096 classes, got {k}")
    return k


def check_ignore(ignore: object, *, n_classes: int) -> int | None:
    """The unlabelled value as an int (or ``None``), checked not to be a class index.

    Parameters
    ----------
    ignore : int or None
        The unlabelled value (255 in the project).
    n_classes : int
        Number of classes K.

    Returns
    -------
    ignore : int or None

    Raises
    ------
    TypeError
        Neither an integer nor ``None``.
    ValueError
        ``ignore`` is one of the class indices ``0 .. n_classes - 1``.
    """
    if ignore is None:
        return None
    if isinstance(ignore, bool) or not isinstance(ignore, int | np.integer):
        raise TypeError(f"ignore: expected an int or None, got {type(ignore).__name__}")
    g = int(ignore)
    if 0 <= g < n_classes:
        raise ValueError(
            f"ignore: the unlabelled value must not be a class index, got {g} with "
            f"n_classes={n_classes}; use 255 (the project's unlabelled value)"
        )
    return g


def as_label_array(mask: object, *, name: str) -> np.ndarray:
    """``mask`` as an ndarray of an integer dtype (no copy when it already is one).

    Parameters
    ----------
    mask : array_like, integer, any shape
    name : str
        Parameter name used in the message.

    Returns
    -------
    mask : ndarray, same shape

    Raises
    ------
    TypeError
        The dtype is not a signed or unsigned integer (float and bool are refused).
    """
    a = np.asarray(mask)
    if a.dtype.kind not in "ui":
        raise TypeError(
            f"{name}: expected an integer class-index array (uint8), got dtype {a.dtype}; "
            "convert with .astype(np.uint8) after checking the values"
        )
    return a


def _bad_values(a: np.ndarray, n_classes: int, ignore: int | None) -> list[int]:
    """Up to ten distinct values of ``a`` that are neither a class nor ``ignore``."""
    flat = a.reshape(-1)
    bad = (flat < 0) | (flat >= n_classes)
    if ignore is not None:
        bad &= flat != ignore
    return [int(v) for v in np.unique(flat[bad])[:10]]


def _value_error(name: str, bad: list[int], n_classes: int, ignore: int | None) -> ValueError:
    allowed = f"0..{n_classes - 1}" + ("" if ignore is None else f" or {ignore} (unlabelled)")
    return ValueError(
        f"{name}: holds values {bad} outside the class indices {allowed}; "
        f"pass n_classes large enough for the schema or map the values first"
    )


def check_label_values(
    mask: np.ndarray, *, name: str, n_classes: int, ignore: int | None
) -> None:
    """Raise unless every value of ``mask`` is a class index or ``ignore``.

    Parameters
    ----------
    mask : ndarray, integer, any shape
    name : str
        Parameter name used in the message.
    n_classes : int
        Valid class indices are ``0 .. n_classes - 1``.
    ignore : int or None
        The unlabelled value, also allowed.

    Raises
    ------
    ValueError
        Naming up to ten offending values.
    """
    if mask.size == 0:
        return
    lo, hi = int(mask.min()), int(mask.max())
    if lo >= 0 and (hi < n_classes or hi == ignore):
        return
    bad = _bad_values(mask, n_classes, ignore)
    if bad:
        raise _value_error(name, bad, n_classes, ignore)


def as_confusion(cm: object, *, name: str = "cm") -> np.ndarray:
    """A square confusion matrix of finite non-negative counts, as float64.

    Parameters
    ----------
    cm : array_like, shape (K, K)
        Counts (or proportions).
    name : str
        Parameter name used in the messages.

    Returns
    -------
    cm : ndarray, shape (K, K), float64

    Raises
    ------
    ValueError
        Not square 2-D, or holding negative or non-finite values.
    TypeError
        Not numbers.
    """
    c = np.asarray(cm)
    if c.ndim != 2 or c.shape[0] != c.shape[1] or c.shape[0] < 1:
        raise ValueError(f"{name}: expected a square (K, K) confusion matrix, got shape {c.shape}")
    if c.dtype.kind not in "uif":
        raise TypeError(f"{name}: expected numbers, got dtype {c.dtype}")
    c = c.astype(np.float64)
    if not np.all(np.isfinite(c)) or np.any(c < 0):
        raise ValueError(f"{name}: expected finite non-negative counts, got min {c.min()}")
    return c


# ---------------------------------------------------------------------------------------
# confusion matrix
# ---------------------------------------------------------------------------------------
def _cm_fast_uint8(a: np.ndarray, b: np.ndarray, k: int) -> np.ndarray:
    """uint8 masks, ignore 255, (k + 1)**2 <= 256: symbols and codes fit one byte.

    ``a + 1`` wraps 255 (unlabelled) to 0 and moves the classes to 1..k; any larger
    value is a bad class index, found with one ``max`` per chunk. Codes
    ``sa * (k + 1) + sb`` are counted with ``np.bincount`` over a uint16 view (two
    pixels per element), and the 256 x 256 table of byte pairs is folded back to codes.
    """
    s = k + 1
    n = a.size
    fa, fb = a.reshape(-1), b.reshape(-1)
    step = min(CHUNK_PIXELS, n)
    u = np.empty(step, np.uint8)
    v = np.empty(step, np.uint8)
    pairs = np.zeros(65536, np.int64)
    codes = np.zeros(s * s, np.int64)
    for start in range(0, n, step):
        x = fa[start : start + step]
        y = fb[start : start + step]
        m = x.size
        uu, vv = u[:m], v[:m]
        np.add(x, 1, out=uu)
        np.add(y, 1, out=vv)
        if int(uu.max()) > k or int(vv.max()) > k:
            for arr, name in ((a, "mask_true"), (b, "mask_test")):
                bad = _bad_values(arr, k, UNLABELLED)
                if bad:
                    raise _value_error(name, bad, k, UNLABELLED)
        uu *= s
        uu += vv
        even = m - (m % 2)
        if even >= 1 << 16:
            pairs += np.bincount(uu[:even].view(np.uint16), minlength=65536)
            if even < m:
                codes[int(uu[-1])] += 1
        else:
            codes += np.bincount(uu, minlength=s * s)[: s * s]
    table = pairs.reshape(256, 256)
    codes += (table.sum(axis=0) + table.sum(axis=1))[: s * s]
    return codes.reshape(s, s)[1:, 1:].copy()


def _cm_general(a: np.ndarray, b: np.ndarray, k: int, ignore: int | None) -> np.ndarray:
    """Any integer dtype and ignore value: int64 symbols per chunk."""
    check_label_values(a, name="mask_true", n_classes=k, ignore=ignore)
    check_label_values(b, name="mask_test", n_classes=k, ignore=ignore)
    fa, fb = a.reshape(-1), b.reshape(-1)
    out = np.zeros(k * k, np.int64)
    for start in range(0, a.size, CHUNK_PIXELS):
        x = fa[start : start + CHUNK_PIXELS].astype(np.int64)
        y = fb[start : start + CHUNK_PIXELS].astype(np.int64)
        if ignore is not None:
            keep = (x != ignore) & (y != ignore)
            x, y = x[keep], y[keep]
        out += np.bincount(x * k + y, minlength=k * k)
    return out.reshape(k, k)


def confusion_matrix(
    mask_true: np.ndarray,
    mask_test: np.ndarray,
    *,
    n_classes: int,
    ignore: int | None = UNLABELLED,
) -> np.ndarray:
    """Pixel confusion matrix of two class-index masks.

    Parameters
    ----------
    mask_true : ndarray, integer, any shape (usually (H, W))
        Reference mask (rows of the result).
    mask_test : ndarray, integer, same shape as ``mask_true``
        Compared mask (columns of the result).
    n_classes : int
        Number of classes K; valid values are 0..K-1.
    ignore : int or None
        Unlabelled value (default 255). A pixel is skipped when either mask holds it.
        ``None`` counts every pixel. Must not be a class index.

    Returns
    -------
    cm : ndarray, shape (K, K), int64
        ``cm[i, j]`` = number of pixels with ``mask_true == i`` and ``mask_test == j``.
        All zeros for empty masks or masks with no commonly labelled pixel.

    Raises
    ------
    ValueError
        Shapes differ, or a mask holds a value that is neither a class nor ``ignore``.
    TypeError
        A mask is not of an integer dtype.

    Notes
    -----
    Works in chunks of about one million pixels with ``np.bincount``; uint8 masks with
    ``ignore=255`` and up to 15 classes take a byte-only fast path (several hundred
    Mpixel/s on one core). Non-contiguous inputs are copied once.
    """
    k = check_n_classes(n_classes)
    g = check_ignore(ignore, n_classes=k)
    a = as_label_array(mask_true, name="mask_true")
    b = as_label_array(mask_test, name="mask_test")
    if a.shape != b.shape:
        raise ValueError(
            f"mask_test: expected shape {a.shape} like mask_true, got {b.shape}; "
            "pass masks of the same tile or image"
        )
    if a.size == 0:
        return np.zeros((k, k), np.int64)
    if a.dtype == np.uint8 and b.dtype == np.uint8 and g == UNLABELLED and (k + 1) ** 2 <= 256:
        return _cm_fast_uint8(a, b, k)
    return _cm_general(a, b, k, g)


# ---------------------------------------------------------------------------------------
# overlap metrics
# ---------------------------------------------------------------------------------------
def _safe_ratio(num: np.ndarray, den: np.ndarray) -> np.ndarray:
    out = np.full(np.shape(num), np.nan, dtype=np.float64)
    np.divide(num, den, out=out, where=den > 0)
    return out


def pixel_accuracy(cm: np.ndarray) -> float:
    """Share of compared pixels on the diagonal, ``sum_i n_ii / sum_ij n_ij``.

    Long, Shelhamer & Darrell (2015).

    Parameters
    ----------
    cm : ndarray, shape (K, K)

    Returns
    -------
    accuracy : float
        ``nan`` when ``cm`` is all zeros.
    """
    c = as_confusion(cm)
    total = c.sum()
    return float(np.trace(c) / total) if total > 0 else math.nan


def iou_per_class(cm: np.ndarray) -> np.ndarray:
    """Intersection over union (Jaccard) per class, ``n_ii / (t_i + sum_j n_ji - n_ii)``.

    Parameters
    ----------
    cm : ndarray, shape (K, K)

    Returns
    -------
    iou : ndarray, shape (K,), float64
        ``nan`` for a class absent from both sides (0 / 0); 0 for a class that only one
        side uses. Symmetric: ``iou_per_class(cm.T)`` is the same.
    """
    c = as_confusion(cm)
    tp = np.diag(c)
    return _safe_ratio(tp, c.sum(axis=1) + c.sum(axis=0) - tp)


def dice_per_class(cm: np.ndarray) -> np.ndarray:
    """Dice (F1) per class, ``2 n_ii / (t_i + sum_j n_ji)`` = ``2 J / (1 + J)``.

    Parameters
    ----------
    cm : ndarray, shape (K, K)

    Returns
    -------
    dice : ndarray, shape (K,), float64
        ``nan`` for a class absent from both sides.
    """
    c = as_confusion(cm)
    return _safe_ratio(2.0 * np.diag(c), c.sum(axis=1) + c.sum(axis=0))


def mean_iou(cm: np.ndarray) -> float:
    """Mean of :func:`iou_per_class` over the classes present on either side.

    Long, Shelhamer & Darrell (2015).

    Parameters
    ----------
    cm : ndarray, shape (K, K)

    Returns
    -------
    miou : float
        ``nan`` when no class is present at all.
    """
    iou = iou_per_class(cm)
    present = ~np.isnan(iou)
    return float(iou[present].mean()) if present.any() else math.nan


# ---------------------------------------------------------------------------------------
# class shares and the IoU line
# ---------------------------------------------------------------------------------------
def class_fractions(mask: np.ndarray, class_indices: Iterable[int]) -> np.ndarray:
    """Share of each listed class among the mask's pixels that hold a listed class.

    Parameters
    ----------
    mask : ndarray, integer, any shape (usually (H, W) uint8)
        Class-index mask; values that are not listed (255 unlabelled, say) are not
        counted.
    class_indices : iterable of int
        The classes, in the order of the result (e.g. ``schema.indices``); each >= 0.

    Returns
    -------
    fractions : ndarray, shape (K,), float64
        ``counts[k] / sum(counts)`` with ``K = len(class_indices)``; all zeros when no
        pixel holds a listed class (an empty or all-unlabelled mask).

    Raises
    ------
    TypeError
        ``mask`` is not of an integer dtype.
    ValueError
        A class index is negative, or ``mask`` holds negative values.
    """
    a = as_label_array(mask, name="mask")
    idx = [int(i) for i in class_indices]
    if any(i < 0 for i in idx):
        raise ValueError(f"class_indices: expected indices >= 0, got {idx}")
    flat = a.reshape(-1)
    if flat.size and int(flat.min()) < 0:
        raise ValueError(
            f"mask: expected class indices >= 0, got a minimum of {int(flat.min())}"
        )
    counts = np.bincount(flat, minlength=max(idx, default=-1) + 1)
    sel = counts[idx].astype(np.float64)
    total = sel.sum()
    return sel / total if total else sel


def format_iou(
    iou: Mapping[str, float | None] | None,
    *,
    names: Sequence[str] | None = None,
    miou: float | None = None,
    digits: int = 3,
) -> str:
    """One line of per-class IoU: ``"crop 0.812 · weed - · symptom -"``.

    Parameters
    ----------
    iou : mapping class name -> float or None, or None
        Per-class IoU (a model version's validation IoU, say). ``None`` or NaN values,
        and names missing from the mapping, show as ``"-"``; ``None`` is an empty mapping.
    names : sequence of str, optional
        Classes to show, in this order (default: the mapping's own order).
    miou : float, optional
        When given, appended as ``" · mIoU 0.729"`` (``"-"`` for NaN).
    digits : int
        Decimals of every figure.

    Returns
    -------
    line : str
        Entries joined by ``" · "``; empty when there is nothing to show.
    """

    def number(value: float | None) -> str:
        if value is None or math.isnan(float(value)):
            return "-"
        return f"{float(value):.{digits}f}"

    values = iou or {}
    order = list(values) if names is None else list(names)
    parts = [f"{n} {number(values.get(n))}" for n in order]
    if miou is not None:
        parts.append(f"mIoU {number(miou)}")
    return " · ".join(parts)
