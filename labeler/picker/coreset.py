"""Core-set: greedy k-center over tile embeddings (Sener & Savarese 2018).

Spelling: "k-center" is the name of the facility-location problem the greedy rule
approximates; every name here (:func:`k_center_greedy`, ``centers``) uses it.

References
----------
Gonzalez, T. F. (1985). Clustering to minimize the maximum intercluster distance.
Theor. Comput. Sci. 38, 293-306.
Sener, O. & Savarese, S. (2018). Active learning for convolutional neural networks:
a core-set approach. ICLR.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from labeler.picker._checks import as_features, check_int, check_vector, index_set

__all__ = ["k_center_greedy", "covering_radius"]

#: Block sizes of the blocked distance computation (rows x columns of a temporary).
_ROW_BLOCK = 4096
_COL_BLOCK = 1024


def _sq_norms(x: np.ndarray) -> np.ndarray:
    """Squared Euclidean norm of each row, shape (N,)."""
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
class _KCenterRun:
    """One greedy run; m = min(k, nc) picks out of nc candidates."""

    order: np.ndarray  # (m,) positions in the candidate block, in pick order
    gains: np.ndarray  # (m,) weighted distance at pick time
    pick_dist: np.ndarray  # (m,) unweighted distance at pick time
    final_dist: np.ndarray  # (nc,) distance to the nearest labelled or chosen point


def _k_center(
    xc: np.ndarray, xl: np.ndarray, k: int, weights: np.ndarray | None
) -> _KCenterRun:
    """Greedy k-center over candidate rows given labelled rows (shared with ``pick``).

    Parameters
    ----------
    xc : ndarray, shape (nc, D), float32
        Candidate embeddings, already checked.
    xl : ndarray, shape (nl, D), float32
        Labelled embeddings (nl may be 0: the candidates' mean then plays the first one).
    k : int
        Picks wanted (>= 1).
    weights : ndarray, shape (nc,), optional
        Non-negative multipliers of the distances.

    Returns
    -------
    _KCenterRun
    """
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
    return _KCenterRun(order, gains, pick_dist, final)


def _candidate_rows(n: int, labelled: np.ndarray, candidates: object) -> np.ndarray:
    """Rows that may be chosen: ``candidates`` (default all) minus ``labelled``, sorted."""
    if candidates is None:
        keep = np.ones(n, bool)
    else:
        keep = np.zeros(n, bool)
        keep[index_set(candidates, n, "candidates")] = True
    keep[labelled] = False
    return np.flatnonzero(keep)


def _check_weights(weights: object, n: int) -> np.ndarray:
    """Distance weights as float64 (n,), finite and >= 0."""
    w = check_vector(weights, "weights", n)
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
    """Greedy k-center (core-set) batch: repeatedly add the point farthest from the chosen.

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
    k = check_int(k, "k", minimum=1)
    x = as_features(features)
    n = x.shape[0]
    lab = index_set(labelled, n, "labelled")
    cand = _candidate_rows(n, lab, candidates)
    w = None if weights is None else _check_weights(weights, n)
    xc = x if cand.size == n else x[cand]
    run = _k_center(xc, x[lab], k, None if w is None else w[cand])
    return cand[run.order]


def covering_radius(
    features: np.ndarray,
    centers: np.ndarray | Sequence[int],
    *,
    points: np.ndarray | Sequence[int] | None = None,
) -> float:
    """Largest distance from a point to its nearest center (the k-center objective).

    Parameters
    ----------
    features : ndarray, shape (N, D)
        Embeddings, finite.
    centers : bool mask (N,) or integer indices
        The centers (e.g. labelled plus chosen rows); at least one.
    points : bool mask (N,) or integer indices, optional
        Points to cover (default all rows). An empty set has radius 0.

    Returns
    -------
    radius : float
        Euclidean, computed in float32 like :func:`k_center_greedy`.

    Raises
    ------
    ValueError
        No center, indices out of range, or bad embeddings.
    """
    x = as_features(features)
    n = x.shape[0]
    c = index_set(centers, n, "centers")
    if c.size == 0:
        raise ValueError("centers: expected at least one center index, got none")
    p = np.arange(n) if points is None else index_set(points, n, "points")
    if p.size == 0:
        return 0.0
    xp = x[p]
    d2 = _min_sq_dist(xp, _sq_norms(xp), x[c], _sq_norms(x[c]))
    return math.sqrt(float(d2.max()))
