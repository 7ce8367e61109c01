"""Chance-corrected agreement: Cohen's and Fleiss' kappa, Krippendorff's alpha, bands.

Convention for an undefined coefficient (the same for every function here): a
chance-corrected coefficient whose expected disagreement is 0 -- every rating falls in
one category -- is 1.0 when the observed disagreement is 0 too (the raters agree
perfectly, there is just no variety to correct for) and ``nan`` otherwise. Krippendorff
(2011) calls alpha undefined in that case; we return 1.0 so that two annotators who both
mark a whole tile as soil are not taken for a disagreement. The store never contests a
tile on ``nan``.

References
----------
Cohen, J. (1960). A coefficient of agreement for nominal scales. Educ. Psychol. Meas. 20.
Fleiss, J. L. (1971). Measuring nominal scale agreement among many raters. Psychol.
Bull. 76(5), 378-382.
Krippendorff, K. (2011). Computing Krippendorff's alpha-reliability. Annenberg School
for Communication, University of Pennsylvania.
Landis, J. R. & Koch, G. G. (1977). The measurement of observer agreement for
categorical data. Biometrics 33(1), 159-174.
"""

from __future__ import annotations

import math

import numpy as np

from labeler.classes import UNLABELLED
from labeler.metrics import (
    CHUNK_PIXELS,
    as_confusion,
    check_ignore,
    check_label_values,
    check_n_classes,
)

__all__ = [
    "LANDIS_KOCH_BANDS",
    "landis_koch_band",
    "cohen_kappa",
    "kappa_per_class",
    "fleiss_kappa",
    "fleiss_kappa_masks",
    "krippendorff_alpha",
]

#: Landis & Koch (1977) bands as ``(upper bound inclusive, name)``; below 0 is "poor".
LANDIS_KOCH_BANDS: tuple[tuple[float, str], ...] = (
    (0.20, "slight"),
    (0.40, "fair"),
    (0.60, "moderate"),
    (0.80, "substantial"),
    (1.00, "almost perfect"),
)


def landis_koch_band(kappa: float) -> str:
    """Name of the Landis & Koch (1977) band of an agreement coefficient.

    Bands with the upper bound inclusive: below 0 "poor"; 0-0.20 "slight" (0.20 is
    slight, 0.2001 fair); to 0.40 "fair"; to 0.60 "moderate"; to 0.80 "substantial";
    to 1.00 "almost perfect".

    Parameters
    ----------
    kappa : float
        A chance-corrected coefficient (Cohen's or Fleiss' kappa, Krippendorff's alpha).

    Returns
    -------
    band : str
        One of "poor", the names of :data:`LANDIS_KOCH_BANDS`, or "undefined" for ``nan``.

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
        on both sides) the result is 1.0 (see the module docstring).
    """
    c = as_confusion(cm)
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
        too gets 1.0 (see the module docstring).
    """
    c = as_confusion(cm)
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
        (``P_e = 1``; see the module docstring).

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
    step = max(CHUNK_PIXELS // n_cat, 1)
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
    """``masks`` as an integer (R, H, W) stack (shared with :mod:`.consensus`)."""
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
    k = check_n_classes(n_classes)
    g = check_ignore(ignore, n_classes=k)
    m = _as_rater_stack(masks)
    r = m.shape[0]
    if r < 2:
        raise ValueError(f"masks: expected at least 2 raters, got {r}")
    check_label_values(m, name="masks", n_classes=k, ignore=g)
    flat = m.reshape(r, -1)
    n_px = flat.shape[1]
    subjects = 0
    sum_sq = 0.0
    col_sums = np.zeros(k, np.float64)
    for start in range(0, n_px, CHUNK_PIXELS):
        block = flat[:, start : start + CHUNK_PIXELS].astype(np.int64)
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
        is pairable; 1.0 when every pairable value is the same (see the module docstring).

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


