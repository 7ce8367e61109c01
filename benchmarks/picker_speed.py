"""Speed of the active-learning picker: pick from 100 000 candidate tiles.

Builds a seeded synthetic pool (random embeddings of width 320, the encoder's deepest
level; random tile scalars and class fractions; a few hundred labelled and overlapped
tiles), then times ``pick_batch`` with the default strategy ``mixed`` and with
``coreset`` at k = 100. Prints one JSON line of figures. The pool is synthetic: it
measures speed only, not label efficiency.

Run: ``.venv/bin/python benchmarks/picker_speed.py``
"""

from __future__ import annotations

import json
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from labeler.picker import CandidatePool, pick_batch  # noqa: E402

N_TILES = 100_000
DIM = 320
K = 100
N_CLASSES = 4
N_LABELLED = 500
N_OVERLAPPED = 50
TARGET_S = 10.0


def make_pool(seed: int = 0) -> CandidatePool:
    """A seeded synthetic pool of ``N_TILES`` tiles."""
    rng = np.random.default_rng(seed)
    embeddings = rng.standard_normal((N_TILES, DIM), dtype=np.float32)
    probs_max = rng.uniform(0.4, 1.0, N_TILES)
    annotators = np.zeros(N_TILES, np.int64)
    annotators[:N_LABELLED] = 1
    annotators[N_LABELLED : N_LABELLED + N_OVERLAPPED] = 2
    agreement = np.full(N_TILES, np.nan)
    agreement[N_LABELLED : N_LABELLED + N_OVERLAPPED] = rng.uniform(0.2, 1.0, N_OVERLAPPED)
    return CandidatePool(
        ids=np.arange(N_TILES),
        embeddings=embeddings,
        entropy=rng.uniform(0.0, np.log(N_CLASSES), N_TILES),
        margin=rng.uniform(0.0, 1.0, N_TILES),
        least_confidence=1.0 - probs_max,
        bald=rng.uniform(0.0, 0.3, N_TILES),
        class_fractions=rng.dirichlet([8.0, 3.0, 1.0, 0.3], N_TILES),
        annotators=annotators,
        agreement=agreement,
    )


def main() -> None:
    t0 = time.perf_counter()
    pool = make_pool()
    seconds_pool = time.perf_counter() - t0
    # warm up BLAS threads and imports on a tiny slice, so the first timing is not charged
    small = CandidatePool(
        ids=pool.ids[:600],
        embeddings=pool.embeddings[:600],
        entropy=pool.entropy[:600],
        margin=pool.margin[:600],
        least_confidence=pool.least_confidence[:600],
        class_fractions=pool.class_fractions[:600],
        annotators=pool.annotators[:600],
        agreement=pool.agreement[:600],
    )
    pick_batch(small, strategy="mixed", k=10)
    timings: dict[str, float] = {}
    ordered: dict[str, int] = {}
    for strategy in ("mixed", "coreset"):
        t0 = time.perf_counter()
        pick = pick_batch(pool, strategy=strategy, k=K, seed=0)
        timings[strategy] = time.perf_counter() - t0
        ordered[strategy] = len(pick)
        if pick.n_chosen != K:
            raise RuntimeError(f"{strategy}: chose {pick.n_chosen} tiles, expected {K}")
    print(
        json.dumps(
            {
                "n_tiles": N_TILES,
                "dim": DIM,
                "k": K,
                "n_ordered": ordered["mixed"],
                "n_labelled": N_LABELLED + N_OVERLAPPED,
                "seconds_pool": round(seconds_pool, 3),
                "seconds_mixed": round(timings["mixed"], 3),
                "seconds_coreset": round(timings["coreset"], 3),
                "target_s": TARGET_S,
                "ok": bool(max(timings.values()) < TARGET_S),
            }
        )
    )


if __name__ == "__main__":
    main()
