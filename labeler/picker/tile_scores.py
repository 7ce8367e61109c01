"""Per-tile scores of the picker: mean uncertainty, class rarity, disagreement.

These are the scalars a proposal carries in the store (:class:`TileUncertainty`) and the
weights :func:`labeler.picker.pick.pick_batch` multiplies them with.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from labeler.metrics import class_fractions as mask_class_fractions
from labeler.picker._checks import (
    check_agreement_range,
    check_fractions,
    check_int,
    check_probs,
    check_samples,
)
from labeler.picker.uncertainty import (
    pixel_bald,
    pixel_entropy,
    pixel_least_confidence,
    pixel_margin,
)

__all__ = [
    "TileUncertainty",
    "tile_uncertainty",
    "class_rarity",
    "rarity_weights",
    "disagreement_scores",
]


@dataclass(frozen=True, eq=False)
class TileUncertainty:
    """Scalars of one proposal.

    Attributes
    ----------
    entropy, margin, least_confidence : float
        Means of the per-pixel scores over the scored pixels.
    bald : float
        Mean BALD over the scored pixels; NaN when no dropout samples were given.
    class_fractions : ndarray, shape (K,)
        Share of the tile's pixels predicted (argmax) as each class; always over the whole
        tile, sums to 1.
    n_scored : int
        Number of pixels the means run over.
    """

    entropy: float
    margin: float
    least_confidence: float
    bald: float
    class_fractions: np.ndarray
    n_scored: int


def tile_uncertainty(
    probs: np.ndarray,
    *,
    samples: np.ndarray | None = None,
    vegetation_only: bool = False,
    background_class: int = 0,
) -> TileUncertainty:
    """Mean uncertainty scores and predicted class fractions of one tile.

    Parameters
    ----------
    probs : ndarray, shape (K, H, W)
        Mean class probabilities per pixel (sum 1 over K, within 1e-3).
    samples : ndarray, shape (T, K, H, W), optional
        MC-dropout passes for BALD.
    vegetation_only : bool
        Average only over pixels whose predicted (argmax) class is not
        ``background_class``, so that bare soil does not dilute the score. A tile with no
        such pixel then scores as certain: entropy 0, margin 1, least confidence 0,
        BALD 0 (NaN without samples), ``n_scored`` 0.
    background_class : int
        Class index of the background (soil), in ``0 .. K-1``.

    Returns
    -------
    TileUncertainty
        Argmax ties go to the lowest class index (``numpy.argmax``).

    Raises
    ------
    ValueError
        For shapes other than (K, H, W) / (T, K, H, W), non-finite or negative values,
        probabilities that do not sum to 1, or a background class out of range.
    """
    p = check_probs(probs, "probs")
    k = p.shape[0]
    background_class = check_int(background_class, "background_class", minimum=0)
    if background_class >= k:
        raise ValueError(
            f"background_class: expected a class index in 0..{k - 1} (probs has {k} "
            f"classes), got {background_class}"
        )
    s = None if samples is None else check_samples(samples, p.shape)
    pred = np.argmax(p, axis=0)
    fractions = mask_class_fractions(pred, range(k))
    scored = pred != background_class if vegetation_only else np.ones(pred.shape, bool)
    n = int(scored.sum())
    if n == 0:
        return TileUncertainty(0.0, 1.0, 0.0, 0.0 if s is not None else math.nan, fractions, 0)
    bald = math.nan if s is None else float(pixel_bald(s)[scored].mean())
    return TileUncertainty(
        entropy=float(pixel_entropy(p)[scored].mean()),
        margin=float(pixel_margin(p)[scored].mean()),
        least_confidence=float(pixel_least_confidence(p)[scored].mean()),
        bald=bald,
        class_fractions=fractions,
        n_scored=n,
    )


def class_rarity(
    reference_fractions: np.ndarray, *, smoothing: float = 0.01, power: float = 1.0
) -> np.ndarray:
    """Rarity of each class, 1 for the rarest, from its share in a reference set of tiles.

    With ``s_k`` the share of class ``k`` among all reference pixels
    (``sum_m f_mk / sum_mk f_mk``; uniform when every fraction is 0), the raw rarity is
    ``r_k = (s_k + smoothing) ** -power`` and the result ``r_k / max_j r_j`` (so any
    renormalisation of the smoothed shares would cancel).

    Parameters
    ----------
    reference_fractions : ndarray, shape (M, K)
        Class fractions of the reference tiles (the labelled set, or the pool), M >= 1.
    smoothing : float
        Pseudo-share added to every class (> 0), so that an absent class gets a finite
        rarity.
    power : float
        Sharpness (>= 0); 0 makes every class equally rare.

    Returns
    -------
    rarity : ndarray, shape (K,)
        Values in (0, 1].
    """
    f = check_fractions(reference_fractions, "reference_fractions")
    if f.shape[0] < 1:
        raise ValueError("reference_fractions: expected at least one tile (row), got none")
    if not (math.isfinite(smoothing) and smoothing > 0):
        raise ValueError(f"smoothing: expected a finite number > 0, got {smoothing}")
    if not (math.isfinite(power) and power >= 0):
        raise ValueError(f"power: expected a finite number >= 0, got {power}")
    k = f.shape[1]
    totals = f.sum(axis=0)
    grand = totals.sum()
    share = totals / grand if grand > 0 else np.full(k, 1.0 / k)
    raw = (share + smoothing) ** (-float(power))
    return raw / raw.max()


def rarity_weights(
    class_fractions: np.ndarray,
    *,
    labelled_fractions: np.ndarray | None = None,
    smoothing: float = 0.01,
    power: float = 1.0,
) -> np.ndarray:
    """Weight of each tile by how much of it is predicted to be rare classes.

    ``w_i = 1 + sum_k f_ik * rho_k`` with ``rho`` = :func:`class_rarity` of the labelled
    set (when given and not empty) or else of the pool itself. A tile made only of the
    rarest class weighs 2; a tile of a common class weighs close to 1.

    Parameters
    ----------
    class_fractions : ndarray, shape (N, K)
        Predicted class fractions of the pool tiles (rows summing to 1 give weights in
        [1, 2]).
    labelled_fractions : ndarray, shape (M, K), optional
        Class fractions of the labelled tiles (of their saved masks); classes the labelled
        set lacks then count as rare.
    smoothing, power : float
        As in :func:`class_rarity`.

    Returns
    -------
    weights : ndarray, shape (N,)
        Empty for an empty pool.
    """
    f = check_fractions(class_fractions, "class_fractions")
    reference = f
    if labelled_fractions is not None:
        ref = check_fractions(labelled_fractions, "labelled_fractions")
        if ref.shape[1] != f.shape[1]:
            raise ValueError(
                f"labelled_fractions: expected {f.shape[1]} classes like class_fractions, "
                f"got {ref.shape[1]}; pass fractions over the same schema"
            )
        if ref.shape[0] > 0:
            reference = ref
    if reference.shape[0] == 0:
        return np.zeros(0)
    rho = class_rarity(reference, smoothing=smoothing, power=power)
    return 1.0 + f @ rho


def disagreement_scores(agreement: np.ndarray) -> np.ndarray:
    """``1 - agreement`` per tile; 0 where the tile was not overlapped (NaN).

    Parameters
    ----------
    agreement : ndarray, shape (N,)
        Per-tile agreement between annotators (Cohen's / Fleiss' kappa in [-1, 1] or IoU in
        [0, 1]); NaN for tiles that only one annotator (or nobody) labelled.

    Returns
    -------
    scores : ndarray, shape (N,)
        In [0, 2] (kappa below 0, agreement worse than chance, scores above 1).

    Raises
    ------
    ValueError
        For values outside [-1, 1] or infinite values.
    """
    a = np.asarray(agreement, dtype=np.float64)
    if a.ndim != 1:
        raise ValueError(f"agreement: expected shape (N,), one value per tile, got {a.shape}")
    check_agreement_range(a, "agreement")
    return np.where(np.isnan(a), 0.0, 1.0 - a)
