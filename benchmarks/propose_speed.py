"""Speed of proposing: encoder tiles/s at 256 x 256, and head-only re-proposal from the cache.

Prints ONE JSON line:

- ``encoder_tiles_per_s``: the optimised encoder path as ``labeler propose`` runs it
  (``encode_tiles``: batch-norm folded into the convolutions, channels-last memory,
  ``torch.inference_mode``, batches of ``--batch`` tiles, float16 features out);
- ``encoder_bf16_tiles_per_s``: the same path with ``precision="bfloat16"`` (what
  ``labeler propose`` runs by default on CPUs with AVX512-BF16 or AMX,
  ``model.precision = "auto"``; ``default_precision`` says which this machine gets);
- ``baseline_tiles_per_s``: the same network and weights in NCHW float32 eager mode,
  batch norms unfolded, one tile at a time under ``torch.no_grad`` (measured in the
  same run, rounds interleaved with the optimised path);
- ``speedup``: the ratio of the two; ``bf16_speedup``: ``encoder_bf16_tiles_per_s`` over
  the same baseline (issue target: at least 3);
- ``head_tiles_per_s``: the full proposal path as ``labeler propose`` runs it:
  ``propose_tiles`` on features already computed and the tiles' pixels, with a refining
  head (FPN once, the dropout classifier ``mc_samples`` times for the entropy/margin/BALD
  maps, the full-resolution refinement once per tile for the mask);
- ``head_bf16_tiles_per_s``: the same with the head's pyramid and refinement in
  bfloat16 (``propose_tiles(precision="bfloat16")``; uncertainty arithmetic float32);
- ``head_coarse_tiles_per_s``: the same head without pixels (coarse-only path: bilinear
  mask from the stride-4 mean probabilities, as before the refinement existed);
- ``head_guided_tiles_per_s``: a head without refinement given the pixels (colour-guided
  upsampling of the mean probabilities, ``labeler.model.upsample``);
- ``refine_cost_ratio``: ``head_coarse_tiles_per_s / head_tiles_per_s`` (same run);
- ``peak_rss_mb``: peak resident memory of the process (``resource`` ru_maxrss);
- context: ``threads``, ``batch``, ``mc_samples``, ``rounds``, ``load_avg_1min``.

Each figure is the best of ``--rounds`` interleaved rounds (on a shared machine the
best round is the least disturbed one). Tiles are seeded random RGB: speed does not
depend on content. ``--compile`` also times ``torch.compile`` of the optimised encoder
(off by default: on this CPU it compiled for ~40 s and was not faster).
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import sys
import time
from pathlib import Path

import numpy as np
import torch

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from labeler.model.encoder import (  # noqa: E402
    encode_tiles,
    load_encoder,
    resolve_precision,
    to_input,
)
from labeler.model.head import REFINE_CHANNELS, HeadConfig, ProposalHead  # noqa: E402
from labeler.model.predict import propose_tiles  # noqa: E402
from labeler.model.runtime import configure_threads  # noqa: E402
from labeler.settings import ModelSettings  # noqa: E402


def _baseline_pass(encoder, tiles: list[np.ndarray]) -> None:
    with torch.no_grad():
        for t in tiles:
            feats = encoder(to_input(t))
            [f.to(torch.float16).numpy() for f in feats]


def _timed(fn) -> float:
    t0 = time.perf_counter()
    fn()
    return time.perf_counter() - t0


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--tiles", type=int, default=48, help="tiles per encoder round")
    ap.add_argument("--baseline-tiles", type=int, default=16, help="tiles per baseline round")
    ap.add_argument("--head-tiles", type=int, default=128, help="tiles per head round")
    ap.add_argument("--batch", type=int, default=4, help="encoder batch size")
    ap.add_argument("--head-batch", type=int, default=16, help="propose_tiles batch size")
    ap.add_argument("--rounds", type=int, default=3)
    ap.add_argument("--threads", type=int, default=ModelSettings().threads)
    ap.add_argument("--mc-samples", type=int, default=ModelSettings().mc_samples)
    ap.add_argument("--compile", action="store_true", help="also time torch.compile")
    args = ap.parse_args(argv)

    threads = configure_threads(args.threads)
    rng = np.random.default_rng(0)
    tiles = [rng.integers(0, 256, (256, 256, 3), dtype=np.uint8) for _ in range(args.tiles)]
    baseline = load_encoder(fold=False, channels_last=False)
    fast = load_encoder(fold=True, channels_last=True)
    fast_bf16 = load_encoder(fold=True, channels_last=True, precision="bfloat16")

    # warm up both paths (first calls allocate and pick kernels)
    _baseline_pass(baseline, tiles[:2])
    encode_tiles(fast, tiles[: args.batch * 2], batch_size=args.batch)
    encode_tiles(fast_bf16, tiles[: args.batch * 2], batch_size=args.batch)
    features = encode_tiles(fast, tiles[:16], batch_size=args.batch)
    head_features = [features[i % len(features)] for i in range(args.head_tiles)]
    head_images = [tiles[i % len(features)] for i in range(args.head_tiles)]
    torch.manual_seed(0)
    head = ProposalHead(
        HeadConfig(class_indices=(0, 1, 2, 3), refine_channels=REFINE_CHANNELS)
    ).eval()
    plain_head = ProposalHead(HeadConfig(class_indices=(0, 1, 2, 3))).eval()
    propose_tiles(head, head_features[:16], mc_samples=args.mc_samples, images=head_images[:16])

    def heads(h: ProposalHead, images) -> None:
        propose_tiles(
            h, head_features, mc_samples=args.mc_samples, batch_size=args.head_batch, images=images
        )

    def heads_bf16() -> None:
        propose_tiles(
            head,
            head_features,
            mc_samples=args.mc_samples,
            batch_size=args.head_batch,
            images=head_images,
            precision="bfloat16",
            dropout_weights=kept,
        )

    kept: dict = {}  # the head's bfloat16 copy, made once as in one propose run
    heads_bf16()
    base_t, fast_t, bf16_t, head_t, coarse_t, guided_t, hb_t = [], [], [], [], [], [], []
    for _ in range(args.rounds):
        base_t.append(_timed(lambda: _baseline_pass(baseline, tiles[: args.baseline_tiles])))
        fast_t.append(_timed(lambda: encode_tiles(fast, tiles, batch_size=args.batch)))
        bf16_t.append(_timed(lambda: encode_tiles(fast_bf16, tiles, batch_size=args.batch)))
        head_t.append(_timed(lambda: heads(head, head_images)))
        hb_t.append(_timed(heads_bf16))
        coarse_t.append(_timed(lambda: heads(head, None)))
        guided_t.append(_timed(lambda: heads(plain_head, head_images)))
    baseline_rate = args.baseline_tiles / min(base_t)
    encoder_rate = args.tiles / min(fast_t)
    result = {
        "encoder_tiles_per_s": round(encoder_rate, 2),
        "baseline_tiles_per_s": round(baseline_rate, 2),
        "encoder_bf16_tiles_per_s": round(args.tiles / min(bf16_t), 2),
        "speedup": round(encoder_rate / baseline_rate, 2),
        "bf16_speedup": round(args.tiles / min(bf16_t) / baseline_rate, 2),
        "head_tiles_per_s": round(args.head_tiles / min(head_t), 1),
        "head_bf16_tiles_per_s": round(args.head_tiles / min(hb_t), 1),
        "head_coarse_tiles_per_s": round(args.head_tiles / min(coarse_t), 1),
        "refine_cost_ratio": round(min(head_t) / min(coarse_t), 2),
        "head_guided_tiles_per_s": round(args.head_tiles / min(guided_t), 1),
        "peak_rss_mb": 0.0,
        "default_precision": resolve_precision("auto"),
        "threads": threads,
        "batch": args.batch,
        "mc_samples": args.mc_samples,
        "head_batch": args.head_batch,
        "tile": 256,
        "rounds": args.rounds,
        "encoder_tiles_per_s_median": round(args.tiles / float(np.median(fast_t)), 2),
        "head_tiles_per_s_median": round(args.head_tiles / float(np.median(head_t)), 1),
        "load_avg_1min": round(os.getloadavg()[0], 2),
    }
    if args.compile:
        t0 = time.perf_counter()
        compiled = torch.compile(fast)
        encode_tiles(compiled, tiles[: args.batch], batch_size=args.batch)
        result["compile_s"] = round(time.perf_counter() - t0, 1)
        ct = [
            _timed(lambda: encode_tiles(compiled, tiles, batch_size=args.batch)) for _ in range(2)
        ]
        result["compiled_tiles_per_s"] = round(args.tiles / min(ct), 2)
    result["peak_rss_mb"] = round(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024, 1)
    print(json.dumps(result))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
