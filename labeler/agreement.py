"""Inter-annotator agreement: metrics, consensus and the summary behind the report.

Pure numpy: every function takes and returns arrays (or plain dataclasses of arrays);
nothing here opens a file, talks to the store or imports torch or textual.

Masks are integer class-index arrays (``uint8`` in the project) in which the value
``ignore`` (default 255, :data:`labeler.classes.UNLABELLED`) marks a pixel that the
annotator left unlabelled. Metrics skip such pixels. Confusion matrices follow the
usual layout: ``cm[i, j]`` counts pixels of class ``i`` in the first (reference) mask
and class ``j`` in the second.

Conventions for undefined values (the same everywhere in this module):

* a ratio whose denominator is 0 because nothing was compared is ``nan``;
* a chance-corrected coefficient (Cohen's or Fleiss' kappa, Krippendorff's alpha)
  whose expected disagreement is 0 -- every rating falls in one category -- is 1.0
  when the observed disagreement is 0 too (the raters agree perfectly, there is just
  no variety to correct for) and ``nan`` otherwise. Krippendorff (2011) calls alpha
  undefined in that case; we return 1.0 so that two annotators who both mark a whole
  tile as soil are not taken for a disagreement. The store never contests a tile on
  ``nan``.

References
----------
Cohen, J. (1960). A coefficient of agreement for nominal scales. Educ. Psychol. Meas. 20.
Fleiss, J. L. (1971). Measuring nominal scale agreement among many raters. Psychol.
Bull. 76(5), 378-382.
Krippendorff, K. (2011). Computing Krippendorff's alpha-reliability. Annenberg School
for Communication, University of Pennsylvania.
Landis, J. R. & Koch, G. G. (1977). The measurement of observer agreement for
categorical data. Biometrics 33(1), 159-174.
Long, J., Shelhamer, E. & Darrell, T. (2015). Fully convolutional networks for semantic
segmentation. CVPR.
Warfield, S. K., Zou, K. H. & Wells, W. M. (2004). Simultaneous truth and performance
level estimation (STAPLE). IEEE Trans. Med. Imaging 23(7), 903-921.
"""

from __future__ import annotations

import itertools
import math
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from datetime import date, datetime

import numpy as np
from scipy import ndimage

from labeler.classes import UNLABELLED, ClassSchema

__all__ = [
    "LANDIS_KOCH_BANDS",
    "confusion_matrix",
    "pixel_accuracy",
    "iou_per_class",
    "dice_per_class",
    "mean_iou",
    "cohen_kappa",
    "kappa_per_class",
    "fleiss_kappa",
    "fleiss_kappa_masks",
    "krippendorff_alpha",
    "boundary_f_score",
    "landis_koch_band",
    "tile_agreement",
    "majority_vote",
    "StapleResult",
    "staple",
    "ComparedImage",
    "PairFigures",
    "ClassFigures",
    "ImageFigures",
    "TileFigures",
    "DayFigures",
    "AgreementSummary",
    "summarise_agreement",
]

#: Pixels handled per step by the chunked loops (bounds the size of temporaries).
_CHUNK = 1 << 20

#: Landis & Koch (1977) bands as ``(upper bound inclusive, name)``; below 0 is "poor".
LANDIS_KOCH_BANDS: tuple[tuple[float, str], ...] = (
    (0.20, "slight"),
    (0.40, "fair"),
    (0.60, "moderate"),
    (0.80, "substantial"),
    (1.00, "almost perfect"),
)


# ---------------------------------------------------------------------------------------
# validation helpers
# ---------------------------------------------------------------------------------------
def _check_n_classes(n_classes: object) -> int:
    if isinstance(n_classes, bool) or not isinstance(n_classes, int | np.integer):
        raise TypeError(f"n_classes: expected an int, got {type(n_classes).__name__}")
    k = int(n_classes)
    if not 1 <= k <= 4096:
        raise ValueError(f"n_classes: expected 1..4096 classes, got {k}")
    return k


def _check_ignore(ignore: object, n_classes: int) -> int | None:
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


def _as_label_array(mask: object, name: str) -> np.ndarray:
    a = np.asarray(mask)
    if a.dtype.kind not in "ui":
        raise TypeError(
            f"{name}: expected an integer class-index array (uint8), got dtype {a.dtype}; "
            "convert with .astype(np.uint8) after checking the values"
        )
    return a


def _flat(a: np.ndarray) -> np.ndarray:
    """A 1-D view of ``a`` (a copy only when ``a`` is not contiguous)."""
    return a.reshape(-1)


def _bad_values(a: np.ndarray, n_classes: int, ignore: int | None) -> list[int]:
    flat = _flat(a)
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


def _check_values(a: np.ndarray, name: str, n_classes: int, ignore: int | None) -> None:
    if a.size == 0:
        return
    lo, hi = int(a.min()), int(a.max())
    if lo >= 0 and (hi < n_classes or hi == ignore):
        return
    bad = _bad_values(a, n_classes, ignore)
    if bad:
        raise _value_error(name, bad, n_classes, ignore)


def _as_cm(cm: object, name: str = "cm") -> np.ndarray:
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
# confusion matrix and overlap metrics
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
    fa, fb = _flat(a), _flat(b)
    step = min(_CHUNK, n)
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
    _check_values(a, "mask_true", k, ignore)
    _check_values(b, "mask_test", k, ignore)
    fa, fb = _flat(a), _flat(b)
    out = np.zeros(k * k, np.int64)
    for start in range(0, a.size, _CHUNK):
        x = fa[start : start + _CHUNK].astype(np.int64)
        y = fb[start : start + _CHUNK].astype(np.int64)
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
    k = _check_n_classes(n_classes)
    g = _check_ignore(ignore, k)
    a = _as_label_array(mask_true, "mask_true")
    b = _as_label_array(mask_test, "mask_test")
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


def _safe_ratio(num: np.ndarray, den: np.ndarray) -> np.ndarray:
    out = np.full(np.shape(num), np.nan, dtype=np.float64)
    np.divide(num, den, out=out, where=den > 0)
    return out


def pixel_accuracy(cm: np.ndarray) -> float:
    """Share of compared pixels on the diagonal, ``sum_i n_ii / sum_ij n_ij``.

    Long, Shelhamer & Darrell (2015). ``nan`` when ``cm`` is all zeros.
    """
    c = _as_cm(cm)
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
    c = _as_cm(cm)
    tp = np.diag(c)
    return _safe_ratio(tp, c.sum(axis=1) + c.sum(axis=0) - tp)


def dice_per_class(cm: np.ndarray) -> np.ndarray:
    """Dice (F1) per class, ``2 n_ii / (t_i + sum_j n_ji)`` = ``2 J / (1 + J)``.

    Returns shape (K,) float64, ``nan`` for a class absent from both sides.
    """
    c = _as_cm(cm)
    return _safe_ratio(2.0 * np.diag(c), c.sum(axis=1) + c.sum(axis=0))


def mean_iou(cm: np.ndarray) -> float:
    """Mean of :func:`iou_per_class` over the classes present on either side.

    Long, Shelhamer & Darrell (2015). ``nan`` when no class is present at all.
    """
    iou = iou_per_class(cm)
    present = ~np.isnan(iou)
    return float(iou[present].mean()) if present.any() else math.nan


# ---------------------------------------------------------------------------------------
# chance-corrected agreement
# ---------------------------------------------------------------------------------------
def _chance_corrected(observed_dis: float, expected_dis: float) -> float:
    """``1 - D_o / D_e`` with the module's convention for ``D_e == 0``."""
    tiny = 1e-15
    if expected_dis <= tiny:
        return 1.0 if observed_dis <= tiny else math.nan
    return float(1.0 - observed_dis / expected_dis)


def cohen_kappa(cm: np.ndarray, *, weights: str | None = None) -> float:
    """Cohen's kappa of two raters from their confusion matrix.

    Parameters
    ----------
    cm : ndarray, shape (K, K)
        Counts (or proportions); rows = rater A, columns = rater B.
    weights : None, "linear" or "quadratic"
        Disagreement weights on the class positions: ``None`` 0/1 (Cohen 1960),
        ``"linear"`` ``|i - j|``, ``"quadratic"`` ``(i - j)**2`` (meaningful only when
        the class order is an ordinal scale).

    Returns
    -------
    kappa : float
        ``1 - sum(w * p_o) / sum(w * p_e)`` with ``p_e`` the product of the margins;
        for 0/1 weights this is ``(p_o - p_e) / (1 - p_e)``. ``nan`` for an empty
        matrix. When ``p_e`` leaves no room for disagreement (every pixel in one class
        on both sides) the result is 1.0 (see the module notes).
    """
    c = _as_cm(cm)
    k = c.shape[0]
    total = c.sum()
    if total <= 0:
        return math.nan
    i, j = np.indices((k, k))
    if weights is None:
        w = (i != j).astype(np.float64)
    elif weights == "linear":
        w = np.abs(i - j).astype(np.float64)
    elif weights == "quadratic":
        w = ((i - j) ** 2).astype(np.float64)
    else:
        raise ValueError(
            f"weights: expected None, 'linear' or 'quadratic', got {weights!r}"
        )
    p = c / total
    expected = np.outer(p.sum(axis=1), p.sum(axis=0))
    return _chance_corrected(float((w * p).sum()), float((w * expected).sum()))


def kappa_per_class(cm: np.ndarray) -> np.ndarray:
    """One-vs-rest Cohen's kappa per class (class i against all others).

    Parameters
    ----------
    cm : ndarray, shape (K, K)

    Returns
    -------
    kappa : ndarray, shape (K,), float64
        Kappa of the 2 x 2 table "class i / not class i" of each class. ``nan`` for a
        class absent from both sides (nothing to compare, as in :func:`iou_per_class`)
        and for an empty matrix. A class that one side uses everywhere and the other
        too gets 1.0 (see the module notes).
    """
    c = _as_cm(cm)
    total = c.sum()
    out = np.full(c.shape[0], np.nan)
    if total <= 0:
        return out
    rows, cols, tp = c.sum(axis=1), c.sum(axis=0), np.diag(c)
    for idx in range(c.shape[0]):
        if rows[idx] + cols[idx] == 0:
            continue
        fn = rows[idx] - tp[idx]
        fp = cols[idx] - tp[idx]
        tn = total - tp[idx] - fn - fp
        out[idx] = cohen_kappa(np.array([[tp[idx], fn], [fp, tn]]))
    return out


def _fleiss_from_sums(n_raters: float, n_subjects: float, sum_sq: float,
                      col_sums: np.ndarray) -> float:
    """Fleiss' kappa from sufficient statistics.

    ``sum_sq = sum_ij n_ij**2``; ``P_bar = (sum_sq - N n) / (N n (n - 1))``,
    ``p_j = col_sums / (N n)``, ``P_e = sum_j p_j**2``.
    """
    nn = n_subjects * n_raters
    p_bar = (sum_sq - nn) / (nn * (n_raters - 1.0))
    p = col_sums / nn
    p_e = float(np.sum(p * p))
    # kappa = (P_bar - P_e) / (1 - P_e) = 1 - (1 - P_bar) / (1 - P_e)
    return _chance_corrected(max(1.0 - p_bar, 0.0), 1.0 - p_e)


def fleiss_kappa(counts: np.ndarray) -> float:
    """Fleiss' kappa for many raters (Fleiss 1971).

    Parameters
    ----------
    counts : ndarray, shape (N, K)
        ``counts[i, j]`` = number of raters who put subject i in category j. Every row
        must sum to the same number of raters n >= 2.

    Returns
    -------
    kappa : float
        ``(P_bar - P_e) / (1 - P_e)``. 1.0 when all ratings fall in one category
        (``P_e = 1``; see the module notes).

    Raises
    ------
    ValueError
        Not 2-D, no subject, negative or non-integer counts, rows with different
        totals, or fewer than two raters.

    Notes
    -----
    Works through the rows in chunks, so a table of millions of pixels (e.g. a
    ``uint8`` table of per-pixel vote counts) needs no float copy of its full size.
    """
    c = np.asarray(counts)
    if c.ndim != 2 or c.shape[0] < 1 or c.shape[1] < 1:
        raise ValueError(
            f"counts: expected shape (N subjects, K categories) with N, K >= 1, got {c.shape}"
        )
    if c.dtype.kind not in "uif":
        raise TypeError(f"counts: expected numbers, got dtype {c.dtype}")
    n_subjects, n_cat = c.shape
    n = None
    sum_sq = 0.0
    col_sums = np.zeros(n_cat, np.float64)
    step = max(_CHUNK // n_cat, 1)
    whole = c.dtype.kind in "ui"
    for start in range(0, n_subjects, step):
        if whole:
            cf = c[start : start + step].astype(np.int64)
            if c.dtype.kind == "i" and np.any(cf < 0):
                raise ValueError("counts: expected non-negative whole numbers of raters")
        else:
            cf = c[start : start + step].astype(np.float64)
            if not np.all(np.isfinite(cf)) or np.any(cf < 0) or np.any(cf != np.round(cf)):
                raise ValueError("counts: expected non-negative whole numbers of raters")
        # column by column: reductions along a short last axis are slow in numpy
        columns = [cf[:, j] for j in range(n_cat)]
        rows = columns[0].copy()
        for col in columns[1:]:
            rows += col
        if n is None:
            n = float(rows[0])
        if np.any(rows != n):
            bad = start + int(np.flatnonzero(rows != n)[0])
            raise ValueError(
                f"counts: every row must sum to the same number of raters; row 0 sums to "
                f"{n:g}, row {bad} to {float(c[bad].sum()):g}; drop subjects with missing "
                "ratings or use krippendorff_alpha"
            )
        for j, col in enumerate(columns):
            sum_sq += float(np.dot(col, col))
            col_sums[j] += float(col.sum())
    if n < 2:
        raise ValueError(f"counts: expected at least 2 raters per subject, got {n:g}")
    return _fleiss_from_sums(n, float(n_subjects), sum_sq, col_sums)


def _as_rater_stack(masks: object, name: str = "masks") -> np.ndarray:
    m = np.asarray(masks)
    if m.dtype.kind not in "ui":
        raise TypeError(
            f"{name}: expected integer class-index masks (uint8), got dtype {m.dtype}"
        )
    if m.ndim != 3 or m.shape[0] < 1:
        raise ValueError(
            f"{name}: expected a stack of shape (R raters, H, W), got {m.shape}; "
            "stack the raters' masks of one image with np.stack"
        )
    return m


def fleiss_kappa_masks(
    masks: np.ndarray, *, n_classes: int, ignore: int | None = UNLABELLED
) -> float:
    """Fleiss' kappa over pixels: each pixel is a subject, each mask a rater.

    Parameters
    ----------
    masks : ndarray, shape (R, H, W), integer
        One mask per rater, R >= 2.
    n_classes : int
        Number of categories K.
    ignore : int or None
        Unlabelled value; a pixel is skipped when any rater left it unlabelled.

    Returns
    -------
    kappa : float
        Fleiss' kappa of the per-pixel category counts (built chunk-wise with
        ``np.bincount``). ``nan`` when no pixel is labelled by every rater.
    """
    k = _check_n_classes(n_classes)
    g = _check_ignore(ignore, k)
    m = _as_rater_stack(masks)
    r = m.shape[0]
    if r < 2:
        raise ValueError(f"masks: expected at least 2 raters, got {r}")
    _check_values(m, "masks", k, g)
    flat = m.reshape(r, -1)
    n_px = flat.shape[1]
    subjects = 0
    sum_sq = 0.0
    col_sums = np.zeros(k, np.float64)
    for start in range(0, n_px, _CHUNK):
        block = flat[:, start : start + _CHUNK].astype(np.int64)
        if g is not None:
            block = block[:, ~np.any(block == g, axis=0)]
        n = block.shape[1]
        if n == 0:
            continue
        idx = np.arange(n, dtype=np.int64)[None, :] * k + block
        counts = np.bincount(idx.ravel(), minlength=n * k).reshape(n, k)
        subjects += n
        sum_sq += float(np.sum(counts * counts))
        col_sums += counts.sum(axis=0)
    if subjects == 0:
        return math.nan
    return _fleiss_from_sums(float(r), float(subjects), sum_sq, col_sums)


def krippendorff_alpha(reliability: np.ndarray, *, level: str = "nominal") -> float:
    """Krippendorff's alpha by the coincidence-matrix method (Krippendorff 2011).

    Parameters
    ----------
    reliability : ndarray, shape (raters, units), float
        Values given by each rater to each unit; ``nan`` = missing. Any number of
        raters; units with fewer than two values are not pairable and are left out.
    level : {"nominal", "ordinal", "interval", "ratio"}
        Metric of the difference function delta**2.

    Returns
    -------
    alpha : float
        ``1 - (n - 1) * sum_ck o_ck d_ck / sum_ck n_c n_k d_ck``. ``nan`` when no unit
        is pairable; 1.0 when every pairable value is the same (see the module notes).

    Notes
    -----
    Coincidences: ``o_ck = sum_u (n_uc n_uk - [c = k] n_uc) / (m_u - 1)`` over the
    pairable units u with m_u values. Ordinal delta: ``(sum_{g=c..k} n_g - (n_c +
    n_k) / 2)**2`` over the ranks of the sorted distinct values; ratio delta:
    ``((c - k) / (c + k))**2`` (0 when ``c + k = 0``).
    """
    levels = ("nominal", "ordinal", "interval", "ratio")
    if level not in levels:
        raise ValueError(f"level: expected one of {', '.join(levels)}, got {level!r}")
    data = np.asarray(reliability, dtype=np.float64)
    if data.ndim != 2:
        raise ValueError(
            f"reliability: expected shape (raters, units), got {data.shape}; "
            "use nan for missing values"
        )
    if np.any(np.isinf(data)):
        raise ValueError("reliability: expected finite values or nan for missing, got inf")
    if level == "ratio" and np.nanmin(data, initial=0.0) < 0:
        raise ValueError("reliability: ratio level needs non-negative values")
    present = ~np.isnan(data)
    m_u = present.sum(axis=0)
    pairable = m_u >= 2
    if not pairable.any():
        return math.nan
    sub = data[:, pairable]
    values, inverse = np.unique(sub[~np.isnan(sub)], return_inverse=True)
    v = values.size
    n_units = sub.shape[1]
    unit_idx = np.broadcast_to(np.arange(n_units), sub.shape)[~np.isnan(sub)]
    counts = np.bincount(unit_idx * v + inverse, minlength=n_units * v).reshape(n_units, v)
    counts = counts.astype(np.float64)
    w = 1.0 / (m_u[pairable] - 1.0)
    o = (counts * w[:, None]).T @ counts - np.diag((counts * w[:, None]).sum(axis=0))
    n_c = o.sum(axis=1)
    n = n_c.sum()
    c_val, k_val = np.meshgrid(values, values, indexing="ij")
    if level == "nominal":
        delta = (c_val != k_val).astype(np.float64)
    elif level == "interval":
        delta = (c_val - k_val) ** 2
    elif level == "ratio":
        s = c_val + k_val
        delta = np.zeros_like(s)
        np.divide((c_val - k_val) ** 2, s * s, out=delta, where=s != 0)
    else:  # ordinal
        cum = np.concatenate([[0.0], np.cumsum(n_c)])
        ci, ki = np.meshgrid(np.arange(v), np.arange(v), indexing="ij")
        lo, hi = np.minimum(ci, ki), np.maximum(ci, ki)
        between = cum[hi + 1] - cum[lo]
        delta = (between - (n_c[ci] + n_c[ki]) / 2.0) ** 2
    observed = float((o * delta).sum())
    expected = float((np.outer(n_c, n_c) * delta).sum()) / (n - 1.0)
    return _chance_corrected(observed, expected)


# ---------------------------------------------------------------------------------------
# boundaries, bands and the tile scalar
# ---------------------------------------------------------------------------------------
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
    a = _as_label_array(mask_true, "mask_true")
    b = _as_label_array(mask_test, "mask_test")
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


def landis_koch_band(kappa: float) -> str:
    """Name of the Landis & Koch (1977) band of an agreement coefficient.

    Bands with the upper bound inclusive: below 0 "poor"; 0-0.20 "slight" (0.20 is
    slight, 0.2001 fair); to 0.40 "fair"; to 0.60 "moderate"; to 0.80 "substantial";
    to 1.00 "almost perfect". ``nan`` gives "undefined".

    Raises
    ------
    ValueError
        For a value above 1 (beyond rounding), which no kappa can take.
    """
    x = float(kappa)
    if math.isnan(x):
        return "undefined"
    if x > 1.0 + 1e-9:
        raise ValueError(f"kappa: expected a value <= 1, got {x}")
    if x < 0:
        return "poor"
    for upper, name in LANDIS_KOCH_BANDS:
        if x <= upper:
            return name
    return LANDIS_KOCH_BANDS[-1][1]


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
    metric : {"kappa", "iou"}
        ``"kappa"``: Cohen's kappa on the pixels both labelled; ``"iou"``: mean IoU of
        the classes present on either side.
    ignore : int or None

    Returns
    -------
    agreement : float
        ``nan`` when the two share no labelled pixel: there is nothing to compare and
        the caller must not contest the tile on it. 1.0 when both mark every common
        pixel with the same single class.
    """
    if metric not in ("kappa", "iou"):
        raise ValueError(f"metric: expected 'kappa' or 'iou', got {metric!r}")
    cm = confusion_matrix(mask_a, mask_b, n_classes=n_classes, ignore=ignore)
    if cm.sum() == 0:
        return math.nan
    return cohen_kappa(cm) if metric == "kappa" else mean_iou(cm)


# ---------------------------------------------------------------------------------------
# consensus
# ---------------------------------------------------------------------------------------
def _check_output_classes(k: int) -> None:
    if k > 255:
        raise ValueError(
            f"n_classes: a uint8 consensus holds at most 255 classes (255 = unlabelled), got {k}"
        )


def majority_vote(
    masks: np.ndarray, *, n_classes: int, ignore: int | None = UNLABELLED
) -> np.ndarray:
    """Per-pixel majority of the raters who labelled the pixel.

    Parameters
    ----------
    masks : ndarray, shape (R, H, W), integer
        One mask per rater (R >= 1).
    n_classes : int
        Number of classes K (at most 255).
    ignore : int or None
        Unlabelled value in the inputs; such votes are not counted.

    Returns
    -------
    consensus : ndarray, shape (H, W), uint8
        The class with the most votes; 255 (unlabelled) where the top count is shared
        by two or more classes (a tie) or where no rater labelled the pixel. With two
        raters every disagreement is therefore a tie.
    """
    k = _check_n_classes(n_classes)
    _check_output_classes(k)
    g = _check_ignore(ignore, k)
    m = _as_rater_stack(masks)
    _check_values(m, "masks", k, g)
    r, h, w = m.shape
    flat = m.reshape(r, -1)
    out = np.empty(h * w, np.uint8)
    count_type = np.uint8 if r < 255 else np.uint32
    for start in range(0, h * w, _CHUNK):
        block = flat[:, start : start + _CHUNK]
        n = block.shape[1]
        votes = np.zeros((k, n), count_type)
        for rater in block:
            for cls in range(k):
                votes[cls] += rater == cls
        top = votes.max(axis=0)
        winner = votes.argmax(axis=0).astype(np.uint8)
        tied = (votes == top).sum(axis=0) > 1
        winner[tied | (top == 0)] = UNLABELLED
        out[start : start + n] = winner
    return out.reshape(h, w)


@dataclass(frozen=True)
class StapleResult:
    """Outcome of :func:`staple`.

    Attributes
    ----------
    consensus : ndarray, shape (H, W), uint8
        Class of largest posterior; 255 where no rater labelled the pixel.
    probabilities : ndarray, shape (K, H, W), float32
        Posterior class probabilities per pixel (the prior where nobody labelled).
    performance : ndarray, shape (R, K, K), float64
        Estimated rater confusion ``P(rater says j | true class i)``, rows = true class.
    sensitivity : ndarray, shape (R, K)
        One-vs-rest ``P(rater says k | true k)`` (the binary form's p for k = 1).
    specificity : ndarray, shape (R, K)
        One-vs-rest ``P(rater does not say k | true not k)`` (the binary form's q for
        k = 1), weighted by the estimated true class totals; ``nan`` when no pixel is
        estimated to be of another class.
    prior : ndarray, shape (K,)
        Class prior used (global vote frequencies).
    iterations : int
        EM iterations run.
    converged : bool
        Whether the largest change of ``performance`` fell below ``tol``.
    """

    consensus: np.ndarray
    probabilities: np.ndarray
    performance: np.ndarray
    sensitivity: np.ndarray
    specificity: np.ndarray
    prior: np.ndarray
    iterations: int
    converged: bool


def _pattern_codes(block: np.ndarray, k: int, ignore: int | None) -> np.ndarray:
    """Base-(K+1) code of each pixel's vote vector; symbol K = not labelled."""
    r = block.shape[0]
    codes = np.zeros(block.shape[1], np.int64)
    base = 1
    for j in range(r):
        sym = block[j].astype(np.int64)
        if ignore is not None:
            sym[sym == ignore] = k
        codes += sym * base
        base *= k + 1
    return codes


def staple(
    masks: np.ndarray,
    *,
    n_classes: int,
    ignore: int | None = UNLABELLED,
    max_iter: int = 50,
    tol: float = 1e-6,
) -> StapleResult:
    """STAPLE consensus and rater performance by EM (Warfield, Zou & Wells 2004).

    Parameters
    ----------
    masks : ndarray, shape (R, H, W), integer
        One mask per rater. Unlabelled pixels of a rater carry no vote of that rater.
    n_classes : int
        Number of classes K >= 2 (at most 255). K = 2 is the binary form: for each rater
        ``sensitivity[:, 1]`` is p and ``specificity[:, 1]`` is q.
    ignore : int or None
    max_iter : int
        Largest number of EM iterations (>= 1).
    tol : float
        Stop when no entry of the performance matrices changes by more than this.

    Returns
    -------
    StapleResult

    Notes
    -----
    The multi-class form estimates a K x K confusion matrix per rater (rows = true
    class, columns = rater's label). E-step: ``W_i(s) ~ f(s) prod_j theta_j[s, D_ij]``
    over the raters who labelled pixel i; M-step: ``theta_j[s, s'] = sum_{i: D_ij = s'}
    W_i(s) / sum_{i labelled by j} W_i(s)``. The prior ``f`` is fixed to the global
    class frequencies of all votes (one of the priors Warfield et al. discuss).
    Raters start at 0.99 on the diagonal and 0.01 / (K - 1) elsewhere. Pixels with the
    same vote vector share one posterior, so EM runs over the distinct vote patterns
    (weighted by their pixel counts) and is cheap even for large images. A class no
    pixel is ever estimated to hold keeps its starting row.
    """
    k = _check_n_classes(n_classes)
    _check_output_classes(k)
    if k < 2:
        raise ValueError(f"n_classes: STAPLE needs at least 2 classes, got {k}")
    g = _check_ignore(ignore, k)
    if isinstance(max_iter, bool) or int(max_iter) != max_iter or max_iter < 1:
        raise ValueError(f"max_iter: expected an integer >= 1, got {max_iter}")
    if not tol > 0:
        raise ValueError(f"tol: expected a positive tolerance, got {tol}")
    m = _as_rater_stack(masks)
    _check_values(m, "masks", k, g)
    r, h, w = m.shape
    flat = m.reshape(r, -1)
    n_px = flat.shape[1]

    # Distinct vote patterns and their pixel counts.
    code_space = (k + 1) ** r
    if code_space <= 1 << 22:
        pattern_count = np.zeros(code_space, np.int64)
        for start in range(0, n_px, _CHUNK):
            codes = _pattern_codes(flat[:, start : start + _CHUNK], k, g)
            pattern_count += np.bincount(codes, minlength=code_space)
        codes_used = np.flatnonzero(pattern_count)
        weight = pattern_count[codes_used].astype(np.float64)
        inverse = None
    else:
        # Many raters: the code table would be too large; find the patterns directly.
        symbols = flat.astype(np.int64)
        if g is not None:
            symbols[symbols == g] = k
        patterns_arr, inverse, counts_u = np.unique(
            symbols, axis=1, return_inverse=True, return_counts=True
        )
        inverse = inverse.reshape(-1)
        weight = counts_u.astype(np.float64)
        codes_used = None
    if codes_used is not None:
        digits = np.empty((r, codes_used.size), np.int64)
        rest = codes_used.copy()
        for j in range(r):
            digits[j] = rest % (k + 1)
            rest //= k + 1
    else:
        digits = patterns_arr
    labelled = digits < k  # (R, P)

    # Prior: global vote frequencies.
    votes = np.zeros(k, np.float64)
    for j in range(r):
        sel = labelled[j]
        votes += np.bincount(digits[j][sel], weights=weight[sel], minlength=k)
    if votes.sum() == 0:
        prior = np.full(k, 1.0 / k)
    else:
        prior = votes / votes.sum()
    with np.errstate(divide="ignore"):
        log_prior = np.log(prior)

    onehot = np.zeros((r, digits.shape[1], k), np.float64)
    for j in range(r):
        sel = np.flatnonzero(labelled[j])
        onehot[j, sel, digits[j, sel]] = 1.0

    theta = np.full((r, k, k), 0.01 / (k - 1))
    theta[:, np.arange(k), np.arange(k)] = 0.99

    def posterior(th: np.ndarray) -> np.ndarray:
        with np.errstate(divide="ignore"):
            log_th = np.log(th)
        logw = np.broadcast_to(log_prior, (digits.shape[1], k)).copy()
        for j in range(r):
            sel = np.flatnonzero(labelled[j])
            logw[sel] += log_th[j][:, digits[j, sel]].T
        top = logw.max(axis=1, keepdims=True)
        top[~np.isfinite(top)] = 0.0
        p = np.exp(logw - top)
        s = p.sum(axis=1, keepdims=True)
        bad = s[:, 0] <= 0
        p[bad] = prior
        s[bad] = 1.0
        return p / s

    converged = False
    iterations = 0
    post = posterior(theta)
    tallies = np.zeros((r, k, k))
    while iterations < int(max_iter):
        iterations += 1
        ww = post * weight[:, None]  # (P, K)
        new = theta.copy()
        for j in range(r):
            tallies[j] = ww.T @ onehot[j]  # (K true, K said)
            den = tallies[j].sum(axis=1)
            ok = den > 0
            new[j, ok] = tallies[j, ok] / den[ok, None]
        change = float(np.max(np.abs(new - theta)))
        theta = new
        post = posterior(theta)
        if change < tol:
            converged = True
            break

    # One-vs-rest sensitivity and specificity from the final tallies.
    ww = post * weight[:, None]
    sens = np.empty((r, k))
    spec = np.empty((r, k))
    for j in range(r):
        t = ww.T @ onehot[j]
        for cls in range(k):
            sens[j, cls] = theta[j, cls, cls]
            others = np.arange(k) != cls
            tn = t[np.ix_(others, others)].sum()
            fp = t[others, cls].sum()
            spec[j, cls] = tn / (tn + fp) if tn + fp > 0 else math.nan

    # Scatter the pattern posteriors back to pixels.
    probs = np.empty((k, n_px), np.float32)
    consensus = np.empty(n_px, np.uint8)
    anyone = labelled.any(axis=0)
    best = post.argmax(axis=1).astype(np.uint8)
    best[~anyone] = UNLABELLED
    if codes_used is not None:
        lookup = np.zeros(code_space, np.int64)
        lookup[codes_used] = np.arange(codes_used.size)
        for start in range(0, n_px, _CHUNK):
            idx = lookup[_pattern_codes(flat[:, start : start + _CHUNK], k, g)]
            probs[:, start : start + idx.size] = post[idx].T
            consensus[start : start + idx.size] = best[idx]
    else:
        probs[:] = post[inverse].T
        consensus[:] = best[inverse]
    return StapleResult(
        consensus=consensus.reshape(h, w),
        probabilities=probs.reshape(k, h, w),
        performance=theta,
        sensitivity=sens,
        specificity=spec,
        prior=prior,
        iterations=iterations,
        converged=converged,
    )


# ---------------------------------------------------------------------------------------
# summary for the manager report
# ---------------------------------------------------------------------------------------
def _window_tuple(win: object, name: str) -> tuple[int, int, int, int]:
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


@dataclass(frozen=True)
class ComparedImage:
    """One image labelled by several annotators, as the store hands it over.

    Attributes
    ----------
    image : str
        Image identifier shown in the report (file name or id).
    masks : mapping str -> ndarray (H, W) uint8
        Annotator name -> stitched image mask (each image pixel once; 255 unlabelled).
    saved_at : mapping str -> datetime
        Annotator name -> time of the save the mask comes from.
    tiles : mapping str -> window, optional
        Tile id -> ``(row, col, height, width)`` (or a ``tiling.Window``) inside the
        image; when given, agreement is also figured per tile for the least agreed list.
    """

    image: str
    masks: Mapping[str, np.ndarray]
    saved_at: Mapping[str, datetime]
    tiles: Mapping[str, object] = field(default_factory=dict)


@dataclass(frozen=True)
class PairFigures:
    """Figures of one annotator pair pooled over the images both labelled.

    ``confusion`` (K, K) int64 has rows = ``annotators[0]``, columns = ``annotators[1]``
    and K = ``schema.n_values``; per-class arrays (K,) are indexed by class index.
    ``images_compared`` counts images with at least one pixel both labelled.
    """

    annotators: tuple[str, str]
    confusion: np.ndarray
    images_compared: int
    pixels_compared: int
    kappa: float
    band: str
    pixel_accuracy: float
    mean_iou: float
    iou: np.ndarray
    dice: np.ndarray
    class_kappa: np.ndarray

    @property
    def label(self) -> str:
        """``"a / b"`` for tables and plots."""
        return f"{self.annotators[0]} / {self.annotators[1]}"


@dataclass(frozen=True)
class ClassFigures:
    """Figures of one class pooled over all pairs and images.

    ``pixels`` counts compared pixels that at least one side put in the class.
    """

    index: int
    name: str
    iou: float
    dice: float
    kappa: float
    band: str
    pixels: int


@dataclass(frozen=True)
class TileFigures:
    """Agreement on one tile window of an image (pairs pooled as for the image)."""

    image: str
    tile: str
    window: tuple[int, int, int, int]
    agreement: float
    kappa: float
    mean_iou: float
    pixels_compared: int


@dataclass(frozen=True)
class ImageFigures:
    """Agreement on one image.

    ``agreement`` is the summary metric (``"kappa"`` or ``"iou"``) of the confusion
    matrix pooled over all annotator pairs of the image; with two annotators it equals
    :func:`tile_agreement` on the stitched masks. ``worst_pair`` is the pair with the
    lowest value of that metric (``None`` when no pair shares a pixel).
    """

    image: str
    annotators: tuple[str, ...]
    agreement: float
    kappa: float
    mean_iou: float
    pixels_compared: int
    worst_pair: tuple[str, str] | None
    worst_value: float
    last_saved: datetime
    tiles: tuple[TileFigures, ...] = ()


@dataclass(frozen=True)
class DayFigures:
    """Agreement pooled over all pair comparisons whose later save fell on ``day``."""

    day: date
    kappa: float
    mean_iou: float
    pixel_accuracy: float
    comparisons: int
    pixels_compared: int


@dataclass(frozen=True)
class AgreementSummary:
    """Everything the report and the agreement table show (no arrays of image size).

    Attributes
    ----------
    metric : {"kappa", "iou"}
        Metric of the per-image and per-tile ``agreement`` values.
    class_indices, class_names : tuple
        The schema's classes in index order.
    pairs : tuple of PairFigures
        Sorted by annotator names.
    classes : tuple of ClassFigures
        One per schema class.
    images : tuple of ImageFigures
        In input order.
    days : tuple of DayFigures
        Sorted by day.
    overall : PairFigures
        All pairs pooled (``annotators == ("all", "all")``).
    """

    metric: str
    class_indices: tuple[int, ...]
    class_names: tuple[str, ...]
    pairs: tuple[PairFigures, ...]
    classes: tuple[ClassFigures, ...]
    images: tuple[ImageFigures, ...]
    days: tuple[DayFigures, ...]
    overall: PairFigures

    def least_agreed(self, n: int = 10) -> tuple[ImageFigures | TileFigures, ...]:
        """The ``n`` least agreed tiles (or images, when no tile windows were given).

        Sorted by ``agreement`` ascending; entries with ``nan`` (nothing compared) are
        left out. Tiles are ranked when any image carries tile windows.
        """
        has_tiles = any(img.tiles for img in self.images)
        pool: list[ImageFigures | TileFigures] = []
        if has_tiles:
            pool = [t for img in self.images for t in img.tiles]
        else:
            pool = list(self.images)
        pool = [p for p in pool if not math.isnan(p.agreement)]
        pool.sort(key=lambda p: (p.agreement, p.image, getattr(p, "tile", "")))
        return tuple(pool[: max(int(n), 0)])


def _pair_figures(names: tuple[str, str], cm: np.ndarray, images: int) -> PairFigures:
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
    if cm.sum() == 0:
        return math.nan, math.nan, math.nan
    kappa, miou = cohen_kappa(cm), mean_iou(cm)
    return (kappa if metric == "kappa" else miou), kappa, miou


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
        Images with two or more annotators' stitched masks (images with fewer are
        listed with ``nan`` agreement and contribute nothing).
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

    Notes
    -----
    For every image and every pair of its annotators (names sorted), the confusion
    matrix of the pixels both labelled is added to the pair's pooled matrix; each
    image pixel is counted once per pair. Per-class figures pool every pair; the
    figures per day pool every pair comparison by the calendar day of its later save.
    A pair with no commonly labelled pixel is listed with 0 images and 0 pixels
    compared and ``nan`` figures.
    """
    if metric not in ("kappa", "iou"):
        raise ValueError(f"metric: expected 'kappa' or 'iou', got {metric!r}")
    if not isinstance(schema, ClassSchema):
        raise TypeError(f"schema: expected a ClassSchema, got {type(schema).__name__}")
    k = schema.n_values
    idx = schema.indices
    pair_cm: dict[tuple[str, str], np.ndarray] = {}
    pair_images: dict[tuple[str, str], int] = {}
    day_cm: dict[date, np.ndarray] = {}
    day_count: dict[date, int] = {}
    images: list[ImageFigures] = []
    total = len(items)
    for done, item in enumerate(items, start=1):
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
            mask = np.asarray(item.masks[name])
            schema.check_mask(mask, name=f"{item.image}: mask of {name}")
            if shape is None:
                shape = mask.shape
            elif mask.shape != shape:
                raise ValueError(
                    f"{item.image}: mask of {name} has shape {mask.shape}, expected {shape} "
                    "like the other annotators'; pass stitched masks of the same image"
                )
        windows = {
            str(t): _window_tuple(w, f"{item.image}: tile {t}") for t, w in item.tiles.items()
        }
        if shape is not None:
            for t, (r0, c0, hh, ww) in windows.items():
                if r0 + hh > shape[0] or c0 + ww > shape[1]:
                    raise ValueError(
                        f"{item.image}: tile {t} window {(r0, c0, hh, ww)} reaches beyond "
                        f"the image of shape {shape}"
                    )
        image_cm = np.zeros((k, k), np.int64)
        tile_cm = {t: np.zeros((k, k), np.int64) for t in windows}
        worst: tuple[str, str] | None = None
        worst_value = math.nan
        last = None
        for a, b in itertools.combinations(names, 2):
            key = (a, b)
            pair_cm.setdefault(key, np.zeros((k, k), np.int64))
            pair_images.setdefault(key, 0)
            later = _later(item.saved_at[a], item.saved_at[b], item.image)
            if not _on_or_after(later, since, item.image):
                continue
            last = later if last is None else _later(last, later, item.image)
            ma, mb = np.asarray(item.masks[a]), np.asarray(item.masks[b])
            cm = confusion_matrix(ma, mb, n_classes=k)
            if cm.sum() == 0:
                continue
            pair_cm[key] += cm
            pair_images[key] += 1
            image_cm += cm
            day = later.date()
            day_cm.setdefault(day, np.zeros((k, k), np.int64))
            day_cm[day] += cm
            day_count[day] = day_count.get(day, 0) + 1
            value = _scalar(cm, metric)[0]
            if worst is None or (not math.isnan(value) and not value >= worst_value):
                worst, worst_value = key, value
            for t, (r0, c0, hh, ww) in windows.items():
                sl = (slice(r0, r0 + hh), slice(c0, c0 + ww))
                tile_cm[t] += confusion_matrix(ma[sl], mb[sl], n_classes=k)
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
        images.append(
            ImageFigures(
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
        )
        if progress is not None:
            progress(done, total)

    pairs = tuple(
        _pair_figures(key, pair_cm[key], pair_images[key]) for key in sorted(pair_cm)
    )
    pooled = np.zeros((k, k), np.int64)
    for cm in pair_cm.values():
        pooled += cm
    overall = _pair_figures(("all", "all"), pooled, sum(pair_images.values()))
    classes = tuple(
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
    days = tuple(
        DayFigures(
            day=d,
            kappa=cohen_kappa(day_cm[d]),
            mean_iou=mean_iou(day_cm[d]),
            pixel_accuracy=pixel_accuracy(day_cm[d]),
            comparisons=day_count[d],
            pixels_compared=int(day_cm[d].sum()),
        )
        for d in sorted(day_cm)
    )
    return AgreementSummary(
        metric=metric,
        class_indices=tuple(idx),
        class_names=schema.names,
        pairs=pairs,
        classes=classes,
        images=tuple(images),
        days=days,
        overall=overall,
    )
