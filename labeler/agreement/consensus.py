"""Consensus of several annotators' masks: per-pixel majority and STAPLE.

References
----------
Warfield, S. K., Zou, K. H. & Wells, W. M. (2004). Simultaneous truth and performance
level estimation (STAPLE). IEEE Trans. Med. Imaging 23(7), 903-921.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from labeler.agreement.kappa import _as_rater_stack
from labeler.classes import UNLABELLED
from labeler.metrics import CHUNK_PIXELS, check_ignore, check_label_values, check_n_classes

__all__ = ["majority_vote", "StapleResult", "staple"]


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
    k = check_n_classes(n_classes)
    _check_output_classes(k)
    g = check_ignore(ignore, n_classes=k)
    m = _as_rater_stack(masks)
    check_label_values(m, name="masks", n_classes=k, ignore=g)
    r, h, w = m.shape
    flat = m.reshape(r, -1)
    out = np.empty(h * w, np.uint8)
    count_type = np.uint8 if r < 255 else np.uint32
    for start in range(0, h * w, CHUNK_PIXELS):
        block = flat[:, start : start + CHUNK_PIXELS]
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
        Unlabelled value in the inputs (default 255).
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
    k = check_n_classes(n_classes)
    _check_output_classes(k)
    if k < 2:
        raise ValueError(f"n_classes: STAPLE needs at least 2 classes, got {k}")
    g = check_ignore(ignore, n_classes=k)
    if isinstance(max_iter, bool) or int(max_iter) != max_iter or max_iter < 1:
        raise ValueError(f"max_iter: expected an integer >= 1, got {max_iter}")
    if not tol > 0:
        raise ValueError(f"tol: expected a positive tolerance, got {tol}")
    m = _as_rater_stack(masks)
    check_label_values(m, name="masks", n_classes=k, ignore=g)
    r, h, w = m.shape
    flat = m.reshape(r, -1)
    n_px = flat.shape[1]

    # Distinct vote patterns and their pixel counts.
    code_space = (k + 1) ** r
    if code_space <= 1 << 22:
        pattern_count = np.zeros(code_space, np.int64)
        for start in range(0, n_px, CHUNK_PIXELS):
            codes = _pattern_codes(flat[:, start : start + CHUNK_PIXELS], k, g)
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
        for start in range(0, n_px, CHUNK_PIXELS):
            idx = lookup[_pattern_codes(flat[:, start : start + CHUNK_PIXELS], k, g)]
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
