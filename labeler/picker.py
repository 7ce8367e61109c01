"""Active-learning scores and batch selection (numpy only).

Three layers, each taking and returning arrays:

1. **Per pixel** (:func:`pixel_entropy`, :func:`pixel_margin`,
   :func:`pixel_least_confidence`, :func:`pixel_bald`, and the stack
   :func:`uncertainty_maps`). ``probs`` arrays hold probabilities along one class axis
   (default axis 0, shape ``(K, ...)``); dropout samples add a sample axis in front
   (``(T, K, ...)``). Natural logarithms throughout (entropy in nats).
2. **Per tile** (:func:`tile_uncertainty`, :func:`class_rarity`, :func:`rarity_weights`,
   :func:`disagreement_scores`): the scalars a proposal carries in the store.
3. **Per batch** (:func:`k_center_greedy`, :func:`covering_radius`, :func:`select_batch`
   over a :class:`CandidatePool`): which tiles the annotators see next, in order, each
   with a score and a reason out of :data:`REASONS`.

Sources: entropy, margin and least confidence are the classic uncertainty-sampling
scores; BALD is the mutual information of Houlsby et al. (2011) with MC-dropout samples
(Gal, Islam & Ghahramani 2017); the core-set batch is the greedy k-centre of
Sener & Savarese (2018).

Masks picked here only decide which tiles people look at first. They are not field
advice; see the README for the cautions on spraying and fungicide decisions.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from labeler.settings import STRATEGIES

__all__ = [
    "pixel_entropy",
    "pixel_margin",
    "pixel_least_confidence",
    "pixel_bald",
    "MAP_CHANNELS",
    "uncertainty_maps",
    "TileUncertainty",
    "tile_uncertainty",
    "class_rarity",
    "rarity_weights",
    "disagreement_scores",
    "k_center_greedy",
    "covering_radius",
    "STRATEGIES",
    "UNCERTAINTY_MEASURES",
    "REASONS",
    "CandidatePool",
    "Selection",
    "select_batch",
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


# -- validation helpers --------------------------------------------------------------------

_SUM_ATOL = 1e-3


def _check_probs(probs: np.ndarray, name: str) -> np.ndarray:
    """``probs`` as float64 (K, H, W): finite, non-negative, summing to 1 over K."""
    p = np.asarray(probs)
    if p.ndim != 3 or min(p.shape) < 1:
        raise ValueError(
            f"{name}: expected class probabilities of shape (K, H, W) with K, H, W >= 1, "
            f"got shape {p.shape}; pass one tile's softmax output"
        )
    p = p.astype(np.float64, copy=False)
    _check_simplex(p, name, axis=0)
    return p


def _check_simplex(p: np.ndarray, name: str, *, axis: int) -> None:
    if not np.isfinite(p).all():
        raise ValueError(f"{name}: expected finite probabilities, got NaN or infinity")
    if p.min() < -_SUM_ATOL:
        raise ValueError(
            f"{name}: expected probabilities >= 0, got a minimum of {p.min():.6g}; "
            "pass softmax outputs, not logits"
        )
    sums = p.sum(axis=axis)
    off = np.abs(sums - 1.0) > _SUM_ATOL
    if off.any():
        raise ValueError(
            f"{name}: expected probabilities summing to 1 over the class axis (within "
            f"{_SUM_ATOL:g}), got sums from {sums.min():.6g} to {sums.max():.6g} at "
            f"{int(off.sum())} pixel(s); pass softmax outputs, not logits"
        )


def _check_samples(samples: np.ndarray, probs_shape: tuple[int, ...]) -> np.ndarray:
    s = np.asarray(samples)
    if s.ndim != 4 or s.shape[0] < 1 or s.shape[1:] != probs_shape:
        raise ValueError(
            f"samples: expected dropout samples of shape (T, {', '.join(map(str, probs_shape))})"
            f" with T >= 1 (T, then the shape of probs), got {s.shape}; pass the passes of "
            "the same tile"
        )
    s = s.astype(np.float64, copy=False)
    _check_simplex(s, "samples", axis=1)
    return s


def _check_int(value: object, name: str, *, minimum: int) -> int:
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)):
        raise TypeError(f"{name}: expected an integer, got {value!r} ({type(value).__name__})")
    if value < minimum:
        raise ValueError(f"{name}: expected an integer >= {minimum}, got {value}")
    return int(value)


def _check_vector(values: object, name: str, n: int, *, allow_nan: bool = False) -> np.ndarray:
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


# -- per-pixel maps ------------------------------------------------------------------------

#: Channel order of :func:`uncertainty_maps`.
MAP_CHANNELS = ("entropy", "margin", "least_confidence", "bald")


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
    maps : ndarray, shape (4, ceil(H / factor), ceil(W / factor)), float32
        Channels in :data:`MAP_CHANNELS` order: entropy (nats), margin, least confidence,
        BALD.
    """
    p = _check_probs(probs, "probs")
    factor = _check_int(factor, "factor", minimum=1)
    _, h, w = p.shape
    bald = np.full((h, w), np.nan)
    if samples is not None:
        bald = pixel_bald(_check_samples(samples, p.shape))
    stack = np.stack([pixel_entropy(p), pixel_margin(p), pixel_least_confidence(p), bald])
    return _block_mean(stack, factor).astype(np.float32)


# -- per tile ------------------------------------------------------------------------------


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
    p = _check_probs(probs, "probs")
    k = p.shape[0]
    background_class = _check_int(background_class, "background_class", minimum=0)
    if background_class >= k:
        raise ValueError(
            f"background_class: expected a class index in 0..{k - 1} (probs has {k} "
            f"classes), got {background_class}"
        )
    s = None if samples is None else _check_samples(samples, p.shape)
    pred = np.argmax(p, axis=0)
    fractions = np.bincount(pred.ravel(), minlength=k) / pred.size
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


def _check_fractions(fractions: object, name: str) -> np.ndarray:
    f = np.asarray(fractions, dtype=np.float64)
    if f.ndim != 2 or f.shape[1] < 1:
        raise ValueError(
            f"{name}: expected class fractions of shape (N, K) with K >= 1, got {f.shape}"
        )
    if not np.isfinite(f).all() or (f < 0).any():
        raise ValueError(f"{name}: expected finite fractions >= 0, got NaN, infinity or < 0")
    return f


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
    f = _check_fractions(reference_fractions, "reference_fractions")
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
    f = _check_fractions(class_fractions, "class_fractions")
    reference = f
    if labelled_fractions is not None:
        ref = _check_fractions(labelled_fractions, "labelled_fractions")
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
    _check_agreement_range(a, "agreement")
    return np.where(np.isnan(a), 0.0, 1.0 - a)


def _check_agreement_range(a: np.ndarray, name: str) -> None:
    known = ~np.isnan(a)
    bad = known & ~((a >= -1.0 - 1e-9) & (a <= 1.0 + 1e-9))
    if bad.any():
        rows = np.flatnonzero(bad)[:5].tolist()
        raise ValueError(
            f"{name}: expected kappa or IoU values in [-1, 1] or NaN (not overlapped), got "
            f"{a[bad][0]} at row(s) {rows}"
        )


# -- greedy k-centre -----------------------------------------------------------------------

_ROW_BLOCK = 4096
_COL_BLOCK = 1024


def _as_features(features: object, name: str = "features") -> np.ndarray:
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


def _index_set(spec: object, n: int, name: str) -> np.ndarray:
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


def _sq_norms(x: np.ndarray) -> np.ndarray:
    return np.einsum("ij,ij->i", x, x)


def _min_sq_dist(a: np.ndarray, sq_a: np.ndarray, b: np.ndarray, sq_b: np.ndarray) -> np.ndarray:
    """Squared distance from each row of ``a`` to its nearest row of ``b``, in blocks."""
    out = np.full(a.shape[0], np.inf, np.float32)
    for r0 in range(0, a.shape[0], _ROW_BLOCK):
        r1 = min(r0 + _ROW_BLOCK, a.shape[0])
        best = out[r0:r1]
        for c0 in range(0, b.shape[0], _COL_BLOCK):
            c1 = min(c0 + _COL_BLOCK, b.shape[0])
            d = a[r0:r1] @ b[c0:c1].T
            d *= -2.0
            d += sq_a[r0:r1, None]
            d += sq_b[None, c0:c1]
            np.minimum(best, d.min(axis=1), out=best)
    np.maximum(out, 0.0, out=out)
    return out


@dataclass(frozen=True)
class _CentreRun:
    order: np.ndarray  # (m,) positions in the candidate block, in pick order
    gains: np.ndarray  # (m,) weighted distance at pick time
    pick_dist: np.ndarray  # (m,) unweighted distance at pick time
    final_dist: np.ndarray  # (nc,) distance to the nearest labelled or chosen point


def _k_centre(
    xc: np.ndarray, xl: np.ndarray, k: int, weights: np.ndarray | None
) -> _CentreRun:
    """Greedy k-centre over candidate rows ``xc`` given labelled rows ``xl`` (float32)."""
    nc = xc.shape[0]
    m = min(k, nc)
    sq_c = _sq_norms(xc)
    min_d2: np.ndarray | None = None
    if xl.shape[0] > 0 and nc > 0:
        min_d2 = _min_sq_dist(xc, sq_c, xl, _sq_norms(xl))
    w2 = None if weights is None else (weights.astype(np.float64) ** 2).astype(np.float32)
    order = np.empty(m, np.int64)
    gains = np.empty(m)
    pick_dist = np.empty(m)

    def to_mean() -> np.ndarray:
        # distance to the candidates' mean, as if the mean were a labelled point
        mean = xc.mean(axis=0, dtype=np.float64).astype(np.float32)
        d2 = sq_c - 2.0 * (xc @ mean) + np.float32(mean @ mean)
        return np.maximum(d2, 0.0)

    for t in range(m):
        base = to_mean() if min_d2 is None else min_d2
        score = base * w2 if w2 is not None else base.copy()
        score[order[:t]] = -1.0
        i = int(np.argmax(score))  # first maximum: lowest index wins ties
        order[t] = i
        gains[t] = math.sqrt(max(float(score[i]), 0.0))
        pick_dist[t] = math.sqrt(float(base[i]))
        d2 = xc @ xc[i]
        d2 *= -2.0
        d2 += sq_c
        d2 += sq_c[i]
        np.maximum(d2, 0.0, out=d2)
        min_d2 = d2 if min_d2 is None else np.minimum(min_d2, d2, out=min_d2)
    if min_d2 is None:
        min_d2 = to_mean() if nc > 0 else np.zeros(0, np.float32)
    final = np.sqrt(min_d2.astype(np.float64))
    final[order] = 0.0
    return _CentreRun(order, gains, pick_dist, final)


def _candidate_rows(n: int, labelled: np.ndarray, candidates: object) -> np.ndarray:
    if candidates is None:
        keep = np.ones(n, bool)
    else:
        keep = np.zeros(n, bool)
        keep[_index_set(candidates, n, "candidates")] = True
    keep[labelled] = False
    return np.flatnonzero(keep)


def _check_weights(weights: object, n: int) -> np.ndarray:
    w = _check_vector(weights, "weights", n)
    if (w < 0).any():
        raise ValueError(f"weights: expected values >= 0, got a minimum of {w.min():.6g}")
    return w


def k_center_greedy(
    features: np.ndarray,
    *,
    k: int,
    labelled: np.ndarray | Sequence[int] | None = None,
    candidates: np.ndarray | Sequence[int] | None = None,
    weights: np.ndarray | None = None,
) -> np.ndarray:
    """Greedy k-centre (core-set) batch: repeatedly add the point farthest from the chosen.

    Each step adds ``argmax_i w_i * min_j ||f_i - f_j||`` over the remaining candidates,
    ``j`` running over the labelled points and the points chosen so far (Sener & Savarese
    2018, with optional weights). With no labelled point, the first pick is the candidate
    farthest (weighted) from the candidates' mean, as if the mean were labelled; the mean
    is then forgotten. Ties go to the lowest row index. Distances are Euclidean, computed
    in float32 as ``|a|^2 + |b|^2 - 2 a.b``, in blocks; cost O(N k D) plus
    O(N |labelled| D) once.

    Parameters
    ----------
    features : ndarray, shape (N, D)
        Pooled encoder embeddings, finite.
    k : int
        Batch size (>= 1). Fewer are returned when fewer candidates exist.
    labelled : bool mask (N,) or integer indices, optional
        Points already labelled; they are never chosen.
    candidates : bool mask (N,) or integer indices, optional
        Points that may be chosen (default: every point not labelled).
    weights : ndarray, shape (N,), optional
        Non-negative multipliers of the distances (uncertainty-weighted diversity).

    Returns
    -------
    indices : ndarray, shape (min(k, n_candidates),), int64
        Row indices in pick order.

    Raises
    ------
    ValueError
        For a wrong shape, NaN or infinite embeddings, negative weights, indices out of
        range or k < 1.
    """
    k = _check_int(k, "k", minimum=1)
    x = _as_features(features)
    n = x.shape[0]
    lab = _index_set(labelled, n, "labelled")
    cand = _candidate_rows(n, lab, candidates)
    w = None if weights is None else _check_weights(weights, n)
    xc = x if cand.size == n else x[cand]
    run = _k_centre(xc, x[lab], k, None if w is None else w[cand])
    return cand[run.order]


def covering_radius(
    features: np.ndarray,
    centres: np.ndarray | Sequence[int],
    *,
    points: np.ndarray | Sequence[int] | None = None,
) -> float:
    """Largest distance from a point to its nearest centre (the k-centre objective).

    Parameters
    ----------
    features : ndarray, shape (N, D)
    centres : bool mask (N,) or integer indices
        The centres (e.g. labelled plus chosen rows); at least one.
    points : bool mask (N,) or integer indices, optional
        Points to cover (default all rows). An empty set has radius 0.

    Returns
    -------
    radius : float
    """
    x = _as_features(features)
    n = x.shape[0]
    c = _index_set(centres, n, "centres")
    if c.size == 0:
        raise ValueError("centres: expected at least one centre index, got none")
    p = np.arange(n) if points is None else _index_set(points, n, "points")
    if p.size == 0:
        return 0.0
    xp = x[p]
    d2 = _min_sq_dist(xp, _sq_norms(xp), x[c], _sq_norms(x[c]))
    return math.sqrt(float(d2.max()))


# -- batch selection -----------------------------------------------------------------------

#: Tile uncertainty measures that ``mixed`` (and the reasons of ``random``) can use.
UNCERTAINTY_MEASURES = ("entropy", "margin", "least_confidence", "bald")

#: The reason strings of a :class:`Selection`, one per ranked tile.
REASONS = ("uncertain", "rare class", "unlike labelled tiles", "annotators disagree")


@dataclass(frozen=True, eq=False, kw_only=True)
class CandidatePool:
    """Everything the picker knows about the tiles of a project, one row per tile.

    Parameters
    ----------
    ids : sequence, shape (N,)
        Tile identifiers (any hashable: store keys, names); unique.
    embeddings : ndarray, shape (N, D)
        Pooled encoder embedding per tile; finite (stored as float32).
    entropy, margin, least_confidence : ndarray, shape (N,)
        Tile means of the per-pixel scores (:func:`tile_uncertainty`); finite.
    class_fractions : ndarray, shape (N, K)
        Predicted class fractions; for labelled tiles preferably those of the saved mask.
    bald : ndarray, shape (N,), optional
        Tile mean BALD; NaN where no dropout samples exist (default all NaN).
    annotators : ndarray, shape (N,), optional
        How many annotators have saved a mask for the tile (default 0 everywhere).
        0 = unlabelled (a candidate); 1 = labelled (never a candidate); 2 or more =
        overlapped (a candidate for review when its agreement is below the threshold).
    agreement : ndarray, shape (N,), optional
        Agreement between the annotators of an overlapped tile (kappa or IoU); NaN where not
        overlapped or not computed yet (default all NaN). Must be NaN for tiles with fewer
        than two annotators.

    Raises
    ------
    ValueError
        For mismatched lengths, duplicate ids, NaN embeddings or scores, or agreement on a
        tile with fewer than two annotators. The message names the field.
    """

    ids: np.ndarray
    embeddings: np.ndarray
    entropy: np.ndarray
    margin: np.ndarray
    least_confidence: np.ndarray
    class_fractions: np.ndarray
    bald: np.ndarray | None = None
    annotators: np.ndarray | None = None
    agreement: np.ndarray | None = None

    def __post_init__(self) -> None:
        if isinstance(self.ids, np.ndarray) and self.ids.ndim == 1:
            ids = self.ids
        else:  # keep the caller's objects as they are (no conversion of ints to text)
            items = list(self.ids)
            ids = np.empty(len(items), object)
            ids[:] = items
        n = ids.shape[0]
        if len(set(ids.tolist())) != n:
            values, counts = np.unique(ids.astype(str), return_counts=True)
            raise ValueError(
                f"pool.ids: expected unique tile ids, got duplicates {values[counts > 1][:5]}"
            )
        x = _as_features(self.embeddings, "pool.embeddings")
        if x.shape[0] != n:
            raise ValueError(
                f"pool.embeddings: expected {n} rows like pool.ids, got {x.shape[0]}; "
                "pass one embedding per tile"
            )
        set_ = object.__setattr__
        set_(self, "ids", ids)
        set_(self, "embeddings", x)
        for name in ("entropy", "margin", "least_confidence"):
            set_(self, name, _check_vector(getattr(self, name), f"pool.{name}", n))
        if (self.entropy < 0).any():
            raise ValueError("pool.entropy: expected values >= 0 (nats)")
        for name in ("margin", "least_confidence"):
            v = getattr(self, name)
            if ((v < 0) | (v > 1)).any():
                raise ValueError(f"pool.{name}: expected values in [0, 1]")
        bald = np.full(n, np.nan) if self.bald is None else self.bald
        bald = _check_vector(bald, "pool.bald", n, allow_nan=True)
        if (bald < 0).any():
            raise ValueError("pool.bald: expected values >= 0 or NaN (no dropout samples)")
        set_(self, "bald", bald)
        f = _check_fractions(self.class_fractions, "pool.class_fractions")
        if f.shape[0] != n:
            raise ValueError(
                f"pool.class_fractions: expected {n} rows like pool.ids, got {f.shape[0]}"
            )
        set_(self, "class_fractions", f)
        ann = np.zeros(n, np.int64) if self.annotators is None else np.asarray(self.annotators)
        if ann.shape != (n,) or not np.issubdtype(ann.dtype, np.integer) or (ann < 0).any():
            raise ValueError(
                f"pool.annotators: expected {n} integer counts >= 0 (shape ({n},)), got "
                f"dtype {ann.dtype} shape {ann.shape}"
            )
        set_(self, "annotators", ann.astype(np.int64))
        agr = np.full(n, np.nan) if self.agreement is None else self.agreement
        agr = _check_vector(agr, "pool.agreement", n, allow_nan=True)
        _check_agreement_range(agr, "pool.agreement")
        lonely = ~np.isnan(agr) & (self.annotators < 2)
        if lonely.any():
            raise ValueError(
                "pool.agreement: expected NaN for tiles with fewer than two annotators, got "
                f"values at row(s) {np.flatnonzero(lonely)[:5].tolist()}; agreement needs two"
            )
        set_(self, "agreement", agr)
        for name in ("ids", "embeddings", "entropy", "margin", "least_confidence", "bald",
                     "class_fractions", "annotators", "agreement"):
            view = getattr(self, name).view()
            view.flags.writeable = False  # the pool is validated once; keep it as checked
            set_(self, name, view)

    def __len__(self) -> int:
        return int(self.ids.shape[0])

    @property
    def labelled(self) -> np.ndarray:
        """Bool (N,): at least one annotator saved a mask."""
        return self.annotators > 0

    @classmethod
    def from_tiles(
        cls,
        ids: Sequence[object],
        embeddings: np.ndarray,
        tiles: Sequence[TileUncertainty],
        *,
        annotators: np.ndarray | None = None,
        agreement: np.ndarray | None = None,
    ) -> CandidatePool:
        """Build a pool from one :class:`TileUncertainty` per tile."""
        if len(tiles) != len(ids):
            raise ValueError(
                f"tiles: expected {len(ids)} TileUncertainty like ids, got {len(tiles)}"
            )
        return cls(
            ids=ids if isinstance(ids, np.ndarray) else list(ids),
            embeddings=embeddings,
            entropy=np.array([t.entropy for t in tiles], float),
            margin=np.array([t.margin for t in tiles], float),
            least_confidence=np.array([t.least_confidence for t in tiles], float),
            bald=np.array([t.bald for t in tiles], float),
            class_fractions=np.array([t.class_fractions for t in tiles], float).reshape(
                len(tiles), -1
            ),
            annotators=annotators,
            agreement=agreement,
        )


@dataclass(frozen=True, eq=False)
class Selection:
    """The picker's answer: a ranking of every candidate, the batch first.

    Attributes
    ----------
    strategy : str
    k : int
        The batch size asked for.
    ids : ndarray, shape (n,)
        Candidate tile ids in rank order; the first ``n_chosen`` are the batch.
    positions : ndarray, shape (n,), int64
        Pool row of each ranked tile.
    scores : ndarray, shape (n,)
        The strategy's score of each ranked tile (see :func:`select_batch`).
    reasons : tuple of str, length n
        One of :data:`REASONS` per ranked tile.
    n_chosen : int
        ``min(k, n)``.
    """

    strategy: str
    k: int
    ids: np.ndarray
    positions: np.ndarray
    scores: np.ndarray
    reasons: tuple[str, ...]
    n_chosen: int

    @property
    def chosen(self) -> np.ndarray:
        """Ids of the batch, in order."""
        return self.ids[: self.n_chosen]

    def __len__(self) -> int:
        return int(self.ids.shape[0])

    def rows(self) -> list[tuple[object, float, str]]:
        """``(id, score, reason)`` per ranked tile."""
        return [
            (i, float(s), r) for i, s, r in zip(self.ids.tolist(), self.scores, self.reasons, strict=True)
        ]


def _rank_desc(score: np.ndarray) -> np.ndarray:
    """Positions sorted by score descending, ties by position ascending."""
    return np.lexsort((np.arange(score.size), -score))


def _ratio(values: np.ndarray, reference: np.ndarray) -> np.ndarray:
    med = float(np.median(reference)) if reference.size else 0.0
    return values / max(med, _TINY)


def _dominant(ratios: Sequence[np.ndarray], labels: Sequence[str]) -> list[str]:
    """Per tile, the label of the largest ratio (the earlier label wins ties)."""
    stacked = np.stack(ratios)
    return [labels[j] for j in np.argmax(stacked, axis=0)]


def select_batch(
    pool: CandidatePool,
    *,
    strategy: str = "mixed",
    k: int,
    seed: int = 0,
    uncertainty: str = "entropy",
    top_m: int | None = None,
    rarity_power: float = 1.0,
    rarity_smoothing: float = 0.01,
    agreement_threshold: float = 0.6,
    include_contested: bool = True,
) -> Selection:
    """Rank the candidate tiles of ``pool`` and choose the next batch of ``k``.

    Candidates are the unlabelled tiles (``annotators == 0``) and, when
    ``include_contested``, the *contested* tiles: two or more annotators whose agreement is
    below ``agreement_threshold``. Tiles with one annotator, and overlapped tiles that
    agree (or whose agreement is not known yet), are never candidates; all labelled tiles
    are the labelled set of the diversity strategies.

    Contested tiles come first (a reviewer should see them), by
    :func:`disagreement_scores` descending, with score ``1 - agreement`` and reason
    ``"annotators disagree"``; they take batch slots. The unlabelled candidates follow in
    the strategy's order:

    ``random``
        A permutation from ``numpy.random.default_rng(seed)``; score ``1 - rank / n``.
    ``entropy``, ``bald``
        Tile mean entropy / BALD, largest first (BALD needs dropout samples: NaN BALD on a
        candidate is an error).
    ``margin``
        Smallest tile mean margin first; score ``1 - margin``.
    ``coreset``
        Greedy k-centre (:func:`k_center_greedy`) over all unlabelled candidates for the
        batch, score = distance to the nearest labelled or earlier chosen tile at pick
        time; the rest follow by distance to the nearest labelled or chosen tile.
    ``mixed`` (default)
        Uncertainty-weighted diversity. Each unlabelled tile weighs
        ``u_i * rho_i``: ``u`` the ``uncertainty`` measure (``1 - margin`` for margin)
        and ``rho`` its :func:`rarity_weights` (reference: the labelled tiles' fractions,
        or the pool's while nothing is labelled). The ``top_m`` heaviest tiles (default
        ``max(3 k, ceil(n / 10))``) go through weighted greedy k-centre; the batch is its
        pick order, the rest follow by weight. Score = weight.

    Only ``random`` uses ``seed``; every other strategy is deterministic, ties going to the
    lower pool row.

    Reasons (which cause dominates): ``"annotators disagree"`` for contested tiles;
    ``"uncertain"`` for entropy, margin and bald; ``"unlike labelled tiles"`` for coreset.
    For mixed and random each factor is divided by its median over the unlabelled
    candidates (the uncertainty ``u``, the rarity weight ``rho``; for tiles of the
    mixed batch also the distance at pick time, divided by the median distance of the
    pre-selected tiles left out of the batch), and the largest ratio names the reason:
    ``"uncertain"``, ``"rare class"`` or ``"unlike labelled tiles"`` (ties in that order).
    For random the reason only describes the tile; it did not cause the pick.

    Parameters
    ----------
    pool : CandidatePool
    strategy : str
        One of :data:`STRATEGIES`.
    k : int
        Batch size, >= 1; fewer tiles are chosen when fewer candidates exist.
    seed : int
        Seed of ``random``.
    uncertainty : str
        Measure of ``mixed`` (and of the reasons of ``random``): one of
        :data:`UNCERTAINTY_MEASURES`.
    top_m : int, optional
        Size of the pre-selection of ``mixed`` (>= 1; raised to k when smaller).
    rarity_power, rarity_smoothing : float
        Passed to :func:`rarity_weights`.
    agreement_threshold : float
        Overlapped tiles agreeing less than this are contested (settings
        ``agreement.threshold``).
    include_contested : bool
        False leaves contested tiles out of the ranking.

    Returns
    -------
    Selection

    Raises
    ------
    ValueError
        Unknown strategy or measure, k < 1, top_m < 1, or NaN BALD where BALD is needed.
    """
    if strategy not in STRATEGIES:
        raise ValueError(
            f"strategy: expected one of {', '.join(STRATEGIES)}, got {strategy!r}"
        )
    if uncertainty not in UNCERTAINTY_MEASURES:
        raise ValueError(
            f"uncertainty: expected one of {', '.join(UNCERTAINTY_MEASURES)}, "
            f"got {uncertainty!r}"
        )
    if not isinstance(pool, CandidatePool):
        raise TypeError(f"pool: expected a CandidatePool, got {type(pool).__name__}")
    k = _check_int(k, "k", minimum=1)
    seed = _check_int(seed, "seed", minimum=0)
    if top_m is not None:
        top_m = _check_int(top_m, "top_m", minimum=1)
    if not math.isfinite(agreement_threshold):
        raise ValueError(
            f"agreement_threshold: expected a finite number, got {agreement_threshold}"
        )

    labelled = pool.labelled
    lab_rows = np.flatnonzero(labelled)
    unl = np.flatnonzero(~labelled)

    # contested tiles first
    contested = (pool.annotators >= 2) & ~np.isnan(pool.agreement)
    contested &= np.nan_to_num(pool.agreement, nan=np.inf) < agreement_threshold
    con = np.flatnonzero(contested) if include_contested else np.zeros(0, np.int64)
    dis = disagreement_scores(pool.agreement)[con]
    con_rank = _rank_desc(dis)
    con_order, con_scores = con[con_rank], dis[con_rank]
    k_rest = max(k - con.size, 0)

    # the strategy over the unlabelled candidates
    order, scores, reasons = _rank_unlabelled(
        pool,
        unl,
        lab_rows,
        strategy=strategy,
        k=k_rest,
        seed=seed,
        uncertainty=uncertainty,
        top_m=top_m,
        rarity_power=rarity_power,
        rarity_smoothing=rarity_smoothing,
    )
    positions = np.concatenate([con_order, order]).astype(np.int64)
    all_scores = np.concatenate([con_scores, scores])
    all_reasons = ("annotators disagree",) * con.size + tuple(reasons)
    return Selection(
        strategy=strategy,
        k=k,
        ids=pool.ids[positions],
        positions=positions,
        scores=all_scores,
        reasons=all_reasons,
        n_chosen=min(k, positions.size),
    )


def _measure(pool: CandidatePool, name: str, rows: np.ndarray) -> np.ndarray:
    if name == "margin":
        return 1.0 - pool.margin[rows]
    values = getattr(pool, name)[rows]
    if name == "bald" and np.isnan(values).any():
        bad = rows[np.isnan(values)]
        raise ValueError(
            f"pool.bald: NaN for {bad.size} candidate tile(s) (first ids "
            f"{pool.ids[bad[:3]].tolist()}); BALD needs MC-dropout samples: propose with "
            "model.mc_samples >= 2, or pick another strategy or uncertainty measure"
        )
    return values


def _rank_unlabelled(
    pool: CandidatePool,
    unl: np.ndarray,
    lab_rows: np.ndarray,
    *,
    strategy: str,
    k: int,
    seed: int,
    uncertainty: str,
    top_m: int | None,
    rarity_power: float,
    rarity_smoothing: float,
) -> tuple[np.ndarray, np.ndarray, list[str]]:
    """Order, scores and reasons of the unlabelled rows ``unl`` (pool rows)."""
    n_u = unl.size
    if n_u == 0:
        return np.zeros(0, np.int64), np.zeros(0), []
    if strategy in ("entropy", "margin", "bald"):
        score = _measure(pool, strategy, unl)
        rank = _rank_desc(score)
        return unl[rank], score[rank], ["uncertain"] * n_u

    x = pool.embeddings
    xl = x[lab_rows]
    if strategy == "coreset":
        xc = x if n_u == len(pool) else x[unl]
        run = _k_centre(xc, xl, k, None)
        rest = np.setdiff1d(np.arange(n_u), run.order, assume_unique=True)
        rest = rest[_rank_desc(run.final_dist[rest])]
        rank = np.concatenate([run.order, rest])
        score = np.concatenate([run.pick_dist, run.final_dist[rest]])
        return unl[rank], score, ["unlike labelled tiles"] * n_u

    u = _measure(pool, uncertainty, unl)
    labelled_fractions = pool.class_fractions[lab_rows] if lab_rows.size else None
    rho = rarity_weights(
        pool.class_fractions[unl],
        labelled_fractions=labelled_fractions,
        smoothing=rarity_smoothing,
        power=rarity_power,
    )
    u_ratio = _ratio(u, u)
    r_ratio = _ratio(rho, rho)
    if strategy == "random":
        rank = np.random.default_rng(seed).permutation(n_u)
        score = 1.0 - np.arange(n_u) / n_u
        reasons = _dominant([u_ratio[rank], r_ratio[rank]], ["uncertain", "rare class"])
        return unl[rank], score, reasons

    # mixed
    weight = u * rho
    by_weight = _rank_desc(weight)
    if k == 0:
        reasons = _dominant([u_ratio[by_weight], r_ratio[by_weight]], ["uncertain", "rare class"])
        return unl[by_weight], weight[by_weight], reasons
    m = top_m if top_m is not None else max(3 * k, math.ceil(n_u / 10))
    m = min(max(m, k), n_u)
    pre = np.sort(by_weight[:m])  # ascending rows: k-centre ties go to the lower row
    run = _k_centre(x[unl[pre]], xl, k, weight[pre])
    chosen = pre[run.order]
    ref = np.setdiff1d(np.arange(m), run.order, assume_unique=True)
    ref_dist = run.final_dist[ref] if ref.size else run.pick_dist
    d_ratio = _ratio(run.pick_dist, ref_dist)
    chosen_reasons = _dominant(
        [u_ratio[chosen], r_ratio[chosen], d_ratio],
        ["uncertain", "rare class", "unlike labelled tiles"],
    )
    is_chosen = np.zeros(n_u, bool)
    is_chosen[chosen] = True
    rest = by_weight[~is_chosen[by_weight]]
    rest_reasons = _dominant([u_ratio[rest], r_ratio[rest]], ["uncertain", "rare class"])
    rank = np.concatenate([chosen, rest])
    return unl[rank], weight[rank], chosen_reasons + rest_reasons
