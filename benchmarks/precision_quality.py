"""Proposal quality in bfloat16 against float32: may ``model.precision`` run in bfloat16?

``labeler propose`` runs the encoder and the head's pyramid and refinement convolutions in
bfloat16 where the CPU has it (``model.precision = "auto"``), on the same weights and with
the same encoder version, so a head reads cached features of either precision. This
script measures what that changes, and prints ONE JSON line:

- ``demo_miou_float32`` / ``demo_miou_bfloat16``: the quality benchmark's demo split
  (``benchmarks/proposal_quality.py``: seeded 10 % of the demo tiles labelled, mIoU of
  soil, crop, weed, symptom on the other tiles, pixels pooled), one head trained on
  float32 features, proposing from float32 features with the float32 head, and from
  bfloat16 features with the head in bfloat16; ``demo_delta`` = bfloat16 - float32;
- ``demo_miou_all_bfloat16``: a second head trained on bfloat16 features and proposing in
  bfloat16 (a project that never ran float32); ``demo_delta_all`` against float32;
- ``open_miou_float32`` / ``open_miou_bfloat16`` / ``open_delta``: the same on the peanut
  crop/weed photos (Tran & Phan 2023, CC BY-SA 4.0; read in place) with a smaller seeded
  split than the quality benchmark's (``--open-train`` photos, 4 tiles each, and
  ``--open-eval`` photos, every tile), to keep the run to minutes;
- ``feature_rel_l2_median``: median over the evaluated demo tiles and levels of
  ``|f_bf16 - f_fp32| / |f_fp32|``;
- context: threads, load.

The issue's accuracy rule: each delta within 0.005 mIoU. Masks are decision support
only: spraying and fungicide decisions follow local regulations and licensed agronomic
advice.
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

REPO = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(REPO))

from benchmarks.datasets import PEANUT, absent_reason, peanut_truth  # noqa: E402
from benchmarks.proposal_quality import (  # noqa: E402
    DEMO,
    TileSource,
    _features,
    _iou_report,
    _train,
    log,
)
from labeler.imagery.read import read_image  # noqa: E402
from labeler.imagery.tiling import stitch  # noqa: E402
from labeler.imagery.write import png_decode  # noqa: E402
from labeler.metrics import confusion_matrix  # noqa: E402
from labeler.model.cache import FeatureCache  # noqa: E402
from labeler.model.encoder import load_encoder  # noqa: E402
from labeler.model.predict import propose_tiles  # noqa: E402
from labeler.model.runtime import configure_threads  # noqa: E402
from labeler.settings import ModelSettings  # noqa: E402

PRECISIONS = ("float32", "bfloat16")


def _encoders_and_caches(root: Path) -> dict[str, tuple[object, FeatureCache]]:
    """Both encoders, each with a cache of its own (same version, different folders)."""
    out = {}
    for p in PRECISIONS:
        enc = load_encoder(precision=p)
        out[p] = (enc, FeatureCache(root / p, encoder_version=enc.version, precision=p))
    return out


def run_demo(encs, settings: ModelSettings, seed: int) -> dict:
    plots = sorted(p for p in DEMO.glob("*.tif") if not p.name.startswith("."))
    sources, truths = [], []
    for p in plots:
        sources.append(TileSource("demo", p.stem, read_image(p), overlap=32))
        truths.append(png_decode(p.with_name(f"{p.stem}_truth.png").read_bytes()))
    items = [(s, t, i) for s, t in zip(sources, truths, strict=True) for i in range(len(s.windows))]
    order = np.random.default_rng(seed).permutation(len(items))
    n_train = max(settings.min_labelled_tiles, round(0.1 * len(items)))
    train_ids, eval_ids = order[:n_train], order[n_train:]

    def data(ids, precision):
        enc, cache = encs[precision]
        feats, masks, ims = [], [], []
        for k in ids:
            src, truth, i = items[k]
            feats += _features(cache, enc, src, [i])
            masks.append(np.array(truth[src.windows[i].slices]))
            ims.append(src.tiles([src.keys[i]])[0])
        return feats, masks, ims

    heads = {}
    keys = [items[k][0].keys[items[k][2]] for k in train_ids]
    for p in PRECISIONS:
        _, masks, ims = data(train_ids, p)
        enc, cache = encs[p]
        heads[p], _ = _train(masks, ims, keys, cache, enc, (0, 1, 2, 3), settings, f"demo {p}")
    runs = {  # name: (head trained on, features and head arithmetic)
        "float32": ("float32", "float32"),
        "bfloat16": ("float32", "bfloat16"),
        "all_bfloat16": ("bfloat16", "bfloat16"),
    }
    cms = {name: np.zeros((4, 4), np.int64) for name in runs}
    rel = []
    for start in range(0, len(eval_ids), 24):
        ids = eval_ids[start : start + 24]
        by_p = {p: data(ids, p) for p in PRECISIONS}
        for a, b in zip(by_p["float32"][0], by_p["bfloat16"][0], strict=True):
            for x, y in zip(a, b, strict=True):
                x32, y32 = x.astype(np.float32), y.astype(np.float32)
                rel.append(float(np.linalg.norm(y32 - x32) / max(np.linalg.norm(x32), 1e-12)))
        for name, (trained, arith) in runs.items():
            feats, masks, ims = by_p[arith]
            props = propose_tiles(
                heads[trained].head,
                feats,
                mc_samples=settings.mc_samples,
                seed=seed,
                images=ims,
                precision=arith,
            )
            for pr, t in zip(props, masks, strict=True):
                cms[name] += confusion_matrix(t, pr.mask, n_classes=4)
    out = {
        f"demo_miou_{name}": round(_iou_report(cm, (0, 1, 2, 3))[0], 4) for name, cm in cms.items()
    }
    out["demo_delta"] = round(out["demo_miou_bfloat16"] - out["demo_miou_float32"], 4)
    out["demo_delta_all"] = round(out["demo_miou_all_bfloat16"] - out["demo_miou_float32"], 4)
    out["feature_rel_l2_median"] = round(float(np.median(rel)), 4)
    log(f"demo: {out}")
    return out


def run_open(encs, settings: ModelSettings, seed: int, n_train: int, n_eval: int) -> dict:
    photos = sorted((PEANUT / "images").glob("*.jpg"))
    order = np.random.default_rng(seed).permutation(len(photos))
    train = [photos[i] for i in order[:n_train]]
    evals = [photos[i] for i in order[n_train : n_train + n_eval]]
    rng = np.random.default_rng(seed)
    enc, cache = encs["float32"]
    keys, masks, pixels = [], [], []
    for photo in train:
        src = TileSource("peanut", photo.stem, read_image(photo), overlap=0)
        truth = peanut_truth(read_image(PEANUT / "labels" / f"{photo.stem}.png"), photo.name)
        pick = sorted(rng.choice(len(src.windows), size=4, replace=False).tolist())
        keys += [src.keys[i] for i in pick]
        masks += [np.array(truth[src.windows[i].slices]) for i in pick]
        pixels += src.tiles([src.keys[i] for i in pick])
    res, _ = _train(masks, pixels, keys, cache, enc, (0, 1, 2), settings, "peanut float32")
    cms = {p: np.zeros((3, 3), np.int64) for p in PRECISIONS}
    for photo in evals:
        image = read_image(photo)
        src = TileSource("peanut", photo.stem, image, overlap=0)
        truth = peanut_truth(read_image(PEANUT / "labels" / f"{photo.stem}.png"), photo.name)
        shapes = [(w.height, w.width) for w in src.windows]
        for p in PRECISIONS:
            feats = _features(encs[p][1], encs[p][0], src, list(range(len(src.windows))))
            props = propose_tiles(
                res.head,
                feats,
                tile_shapes=shapes,
                mc_samples=settings.mc_samples,
                seed=seed,
                images=src.tiles(src.keys),
                precision=p,
            )
            pred = stitch([q.mask for q in props], src.windows, shape=image.shape[:2])
            cms[p] += confusion_matrix(truth, pred, n_classes=3)
    out = {f"open_miou_{p}": round(_iou_report(cm, (0, 1, 2))[0], 4) for p, cm in cms.items()}
    out["open_delta"] = round(out["open_miou_bfloat16"] - out["open_miou_float32"], 4)
    out["open_photos"] = {"train": len(train), "eval": len(evals)}
    log(f"peanut: {out}")
    return out


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--threads", type=int, default=0)
    ap.add_argument("--open-train", type=int, default=60, help="peanut training photos")
    ap.add_argument("--open-eval", type=int, default=30, help="peanut evaluation photos")
    ap.add_argument("--skip-open", action="store_true")
    ap.add_argument("--skip-demo", action="store_true")
    args = ap.parse_args(argv)
    threads = configure_threads(args.threads)
    settings = ModelSettings(seed=args.seed)
    result: dict[str, object] = {}
    reasons: dict[str, str] = {}
    t0 = time.perf_counter()
    with tempfile.TemporaryDirectory(prefix="labeler-precision-") as tmp:
        encs = _encoders_and_caches(Path(tmp))
        if args.skip_demo:
            reasons["demo"] = "--skip-demo"
        else:
            result.update(run_demo(encs, settings, args.seed))
        if args.skip_open:
            reasons["open"] = "--skip-open"
        elif not (PEANUT / "images").is_dir():
            reasons["open"] = absent_reason(PEANUT, expected="images/")
        else:
            result.update(run_open(encs, settings, args.seed, args.open_train, args.open_eval))
    result["reasons"] = reasons
    result["context"] = {
        "threads": threads,
        "seconds": round(time.perf_counter() - t0, 1),
        "load_avg_1min": round(os.getloadavg()[0], 2),
    }
    print(json.dumps(result))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
