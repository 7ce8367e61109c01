"""Slow pure-Python references and a pool builder shared by the picker tests.

Every vectorised function of labeler.picker is compared with one of these loops; they
follow the published definitions step by step (greedy k-center: Sener & Savarese 2018;
rarity: the formula in labeler.picker.tile_scores.class_rarity).
"""

from __future__ import annotations

import math

import numpy as np

from labeler.picker import CandidatePool

__all__ = [
    "LN2",
    "entropy_loop",
    "dist",
    "k_center_loop",
    "radius_loop",
    "rarity_loop",
    "random_probs",
    "make_pool",
]

LN2 = math.log(2.0)


def entropy_loop(p):
    return -sum(x * math.log(x) for x in p if x > 0)


def dist(a, b):
    return math.sqrt(sum((float(x) - float(y)) ** 2 for x, y in zip(a, b, strict=True)))


def k_center_loop(x, k, labelled=(), candidates=None, weights=None):
    """Greedy k-center, one point at a time, in float64 (strict > keeps the lowest index)."""
    n = len(x)
    lab = sorted(set(int(i) for i in labelled))
    pool = range(n) if candidates is None else sorted(set(int(i) for i in candidates))
    cand = [i for i in pool if i not in lab]
    w = [1.0] * n if weights is None else [float(v) for v in weights]
    centers = [x[j] for j in lab]
    chosen = []
    for _ in range(min(k, len(cand))):
        if centers:
            refs = centers
        else:  # the candidates' mean plays the labelled point for the first pick
            refs = [[sum(float(x[i][d]) for i in cand) / len(cand) for d in range(len(x[0]))]]
        best, best_i = -1.0, None
        for i in cand:
            if i in chosen:
                continue
            score = w[i] * min(dist(x[i], r) for r in refs)
            if score > best:
                best, best_i = score, i
        chosen.append(best_i)
        centers.append(x[best_i])
    return chosen


def radius_loop(x, centers, points):
    return max(min(dist(x[p], x[c]) for c in centers) for p in points)


def rarity_loop(reference, smoothing, power):
    k = len(reference[0])
    totals = [sum(row[j] for row in reference) for j in range(k)]
    grand = sum(totals)
    share = [t / grand for t in totals]
    raw = [(s + smoothing) ** -power for s in share]
    return [r / max(raw) for r in raw]


def random_probs(rng, shape):
    """Dirichlet class probabilities with the class axis first."""
    k = shape[0]
    flat = rng.dirichlet(np.ones(k), size=int(np.prod(shape[1:])))
    return np.moveaxis(flat.reshape(*shape[1:], k), -1, 0)


def make_pool(rng, n=30, d=4, k_classes=4, **overrides):
    fields = {
        "ids": [f"plot-b{i:03d}" for i in range(n)],
        "embeddings": rng.normal(size=(n, d)),
        "entropy": rng.uniform(0.0, 1.3, n),
        "margin": rng.uniform(0.0, 1.0, n),
        "least_confidence": rng.uniform(0.0, 0.7, n),
        "bald": rng.uniform(0.0, 0.3, n),
        "class_fractions": rng.dirichlet([6.0, 3.0, 1.0, 0.3][:k_classes], n),
    }
    fields.update(overrides)
    return CandidatePool(**fields)
