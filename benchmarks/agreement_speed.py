"""Speed of labeler.metrics.confusion_matrix against scikit-learn, in the same run.

Two seeded random 8000 x 8000 uint8 masks with 4 classes and about 5 % unlabelled (255)
pixels in each. Our function runs on the whole pair (best of ``repeats``);
``sklearn.metrics.confusion_matrix`` is slow at this size, so it runs on a contiguous
subsample (``sklearn_pixels``) including the filtering of unlabelled pixels a caller would
need; both rates are per input pixel. ``--full-sklearn`` runs scikit-learn once on the
whole pair instead (slower per pixel than on the subsample, which fits the caches better,
so the default speedup is the conservative one). The extra memory of one call is measured with
tracemalloc (numpy reports its buffers to it). Prints one JSON line.

Targets: >= 100 Mpixel/s and >= 20 x scikit-learn.
"""

from __future__ import annotations

import json
import os
import sys
import time
import tracemalloc
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from sklearn.metrics import confusion_matrix as sk_confusion_matrix  # noqa: E402

from labeler.metrics import confusion_matrix  # noqa: E402

SIDE = 8000
K = 4
REPEATS = 3
SKLEARN_PIXELS = 4_000_000


def make_masks(seed: int = 0) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    a = rng.integers(0, K, (SIDE, SIDE), dtype=np.uint8)
    b = a.copy()
    flip = rng.random((SIDE, SIDE), dtype=np.float32) < 0.2
    b[flip] = rng.integers(0, K, int(flip.sum()), dtype=np.uint8)
    del flip
    a[rng.random((SIDE, SIDE), dtype=np.float32) < 0.05] = 255
    b[rng.random((SIDE, SIDE), dtype=np.float32) < 0.05] = 255
    return a, b


def best_time(fn, repeats: int) -> tuple[float, object]:
    best, out = float("inf"), None
    for _ in range(repeats):
        t0 = time.perf_counter()
        out = fn()
        best = min(best, time.perf_counter() - t0)
    return best, out


def main() -> None:
    a, b = make_masks()
    pixels = a.size
    ours_s, cm = best_time(lambda: confusion_matrix(a, b, n_classes=K), REPEATS)

    full = "--full-sklearn" in sys.argv[1:]
    sk_pixels = pixels if full else SKLEARN_PIXELS
    fa, fb = a.reshape(-1)[:sk_pixels], b.reshape(-1)[:sk_pixels]

    def with_sklearn():
        keep = (fa != 255) & (fb != 255)
        return sk_confusion_matrix(fa[keep], fb[keep], labels=list(range(K)))

    sk_s, sk_cm = best_time(with_sklearn, 1 if full else REPEATS)
    ours_sub = confusion_matrix(fa, fb, n_classes=K)
    agree = bool(np.array_equal(ours_sub, sk_cm))

    tracemalloc.start()
    confusion_matrix(a, b, n_classes=K)
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()

    ours_rate = pixels / ours_s / 1e6
    sk_rate = sk_pixels / sk_s / 1e6
    print(json.dumps({
        "benchmark": "agreement_confusion_matrix",
        "mpix_per_s": round(ours_rate, 1),
        "sklearn_mpix_per_s": round(sk_rate, 2),
        "speedup": round(ours_rate / sk_rate, 1),
        "pixels": pixels,
        "sklearn_pixels": sk_pixels,
        "sklearn_subsample": not full,
        "repeats": REPEATS,
        "timing": "best of repeats",
        "seconds": round(ours_s, 4),
        "sklearn_seconds": round(sk_s, 4),
        "pixels_compared": int(cm.sum()),
        "matches_sklearn": agree,
        "extra_peak_mb": round(peak / 2**20, 1),
        "input_mb": round(2 * pixels / 2**20, 1),
        "cpu_count": os.cpu_count(),
        "meets_targets": bool(ours_rate >= 100 and ours_rate / sk_rate >= 20),
    }))


if __name__ == "__main__":
    main()
