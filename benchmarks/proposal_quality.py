"""Quality of the proposals: demo scenario, peanut crop/weed photos, soybean rust lesions.

Prints ONE JSON line with

- ``demo_cold_vegetation_iou``: IoU of the cold-start vegetation mask (ExG - ExR,
  ``labeler.masks.coldstart.image_vegetation``, project defaults) against the truth's
  vegetation (crop, weed and symptom pixels), pooled over the committed demo plots;
- ``demo_miou_10pct`` / ``demo_iou_per_class``: the head retrained on the truth of a
  seeded random 10 % of the demo tiles (256 px, overlap 32, as a project cuts them),
  evaluated on the other tiles (pixels pooled; soil, crop, weed, symptom);
- ``open_miou`` / ``open_iou_per_class``: peanut crop/weed dataset (Tran & Phan,
  "Dense Multi-Scale Convolutional Network for Plant Segmentation", IEEE Access 11,
  2023; CC BY-SA 4.0): a seeded split of its 400 photos into 300 training and 100
  evaluation images; IoU of soil, crop, weed on the evaluation images, stitched from tiles;
- ``lesion_iou``: Asian soybean rust leaves (dataset repository Prograf-UFF/asrdnet_dataset,
  paper "ASRDNet: A new image-segmentation neural network model for detecting Asian rust
  on soybean leaves"; MIT badge): seeded 48 / 15 split, IoU of the symptom class against
  the experts' consensus mask (``binary_mask`` 255 = two or more of three votes).

The head is trained as ``labeler retrain`` trains it, with the tiles' pixels, so it
learns the full-resolution refinement (``labeler.model.refine``). Every figure is given
for the mask as ``labeler propose`` makes it from the tile's pixels (the refined logits,
``propose_tiles(images=...)``) and, under keys ending ``_coarse``, for the same head's
stride-4 probabilities upsampled bilinearly (the mask without the refinement, as
``propose_tiles`` makes it when no pixels are given).

The open datasets are read in place from the open-dataset folder
(:data:`benchmarks.datasets.DATASETS`, outside the repository) and never copied; a
missing dataset gives null with a reason under ``reasons``. Features are cached in a
temporary folder (``--cache`` keeps them between runs). The encoder is the
frozen ImageNet-1k EfficientNet-Lite0; only the head learns. Training on the open
datasets uses a seeded subset of the training tiles (``--train-tiles-per-image``) to keep
the run to minutes on a CPU; evaluation uses every tile of the evaluation images.

Masks are decision support only: spraying and fungicide decisions follow local
regulations and licensed agronomic advice.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import sys
import tempfile
import time
from collections.abc import Callable
from pathlib import Path

import numpy as np

REPO = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(REPO))

from benchmarks.datasets import PEANUT, SOYBEAN, absent_reason, peanut_truth  # noqa: E402
from labeler.imagery.read import read_image  # noqa: E402
from labeler.imagery.tiling import stitch, tile_grid  # noqa: E402
from labeler.imagery.write import png_decode  # noqa: E402
from labeler.metrics import confusion_matrix, iou_per_class  # noqa: E402
from labeler.model.cache import FeatureCache  # noqa: E402
from labeler.model.encoder import load_encoder  # noqa: E402
from labeler.model.predict import propose_tiles  # noqa: E402
from labeler.model.runtime import configure_threads  # noqa: E402
from labeler.model.train import train_head  # noqa: E402
from labeler.settings import ModelSettings  # noqa: E402

DEMO = REPO / "demo_fields"
TILE = 256


def log(msg: str) -> None:
    print(f"[{time.strftime('%H:%M:%S')}] {msg}", file=sys.stderr, flush=True)


def _round(values) -> list[float | None]:
    return [None if not math.isfinite(float(v)) else round(float(v), 4) for v in values]


def _iou_report(cm: np.ndarray, classes: tuple[int, ...]) -> tuple[float, dict[str, float | None]]:
    iou = iou_per_class(cm)[list(classes)]
    present = np.isfinite(iou)
    miou = float(np.mean(iou[present])) if present.any() else math.nan
    return miou, iou


class TileSource:
    """Tiles of one image, keyed ``<dataset>/<image id>/<row>,<col>,<h>,<w>``."""

    def __init__(self, dataset: str, ident: str, image: np.ndarray, *, overlap: int) -> None:
        self.image = image
        self.windows = tile_grid(*image.shape[:2], size=TILE, overlap=overlap)
        self.keys = [
            f"{dataset}/{ident}/{w.row},{w.col},{w.height},{w.width}" for w in self.windows
        ]
        self._by_key = dict(zip(self.keys, self.windows, strict=True))

    def tiles(self, keys: list[str]) -> list[np.ndarray]:
        return [np.array(self.image[self._by_key[k].slices]) for k in keys]


def _features(cache: FeatureCache, encoder, src: TileSource, idx: list[int]):
    keys = [src.keys[i] for i in idx]
    shapes = [(src.windows[i].height, src.windows[i].width) for i in idx]
    return cache.get_or_compute(keys, src.tiles, encoder, tile_shapes=shapes, batch_size=4)


def _train(masks, feats, images, encoder, classes, settings: ModelSettings, label: str):
    t0 = time.perf_counter()

    def progress(epoch: int, total: int, m: dict) -> None:
        log(
            f"{label}: epoch {epoch}/{total} train {m['train_loss']:.4f} "
            f"val {m['val_loss']:.4f} mIoU {m['val_miou']:.3f}"
        )

    res = train_head(
        masks,
        class_indices=classes,
        features=feats,
        images=images,
        encoder=encoder,
        settings=settings,
        progress=progress,
    )
    log(
        f"{label}: trained in {time.perf_counter() - t0:.0f} s, mode {res.mode}, "
        f"best epoch {res.best_epoch}, {res.n_train} train / {res.n_val} val tiles"
    )
    return res


# -- demo scenario -------------------------------------------------------------------------------
def run_demo(encoder, cache: FeatureCache, settings: ModelSettings, seed: int) -> dict:
    try:
        from labeler.masks.coldstart import image_vegetation
    except ImportError as exc:
        return {"reason": f"cold start not available ({exc})"}
    plots = sorted(p for p in DEMO.glob("*.tif") if not p.name.startswith("."))
    if not plots:
        return {"reason": f"no demo plots in {DEMO.name}/"}
    inter = union = 0
    sources, truths = [], []
    for p in plots:
        image = read_image(p)
        truth = png_decode(p.with_name(f"{p.stem}_truth.png").read_bytes())
        veg = image_vegetation(image)
        true_veg = np.isin(truth, (1, 2, 3))
        inter += int(np.sum(veg & true_veg))
        union += int(np.sum(veg | true_veg))
        sources.append(TileSource("demo", p.stem, image, overlap=32))
        truths.append(truth)
    out: dict[str, object] = {"demo_cold_vegetation_iou": round(inter / union, 4)}
    log(f"demo: cold-start vegetation IoU {inter / union:.4f} over {len(plots)} plots")

    items = [(s, t, i) for s, t in zip(sources, truths, strict=True) for i in range(len(s.windows))]
    rng = np.random.default_rng(seed)
    n_train = max(settings.min_labelled_tiles, round(0.1 * len(items)))
    order = rng.permutation(len(items))
    train_ids, eval_ids = order[:n_train], order[n_train:]

    def tile_data(ids):
        feats, masks, ims = [], [], []
        for k in ids:
            src, truth, i = items[k]
            feats += _features(cache, encoder, src, [i])
            masks.append(np.array(truth[src.windows[i].slices]))
            ims.append(src.tiles([src.keys[i]])[0])
        return feats, masks, ims

    feats, masks, ims = tile_data(train_ids)
    res = _train(masks, feats, ims, encoder, (0, 1, 2, 3), settings, "demo")
    cm = {"refined": np.zeros((4, 4), np.int64), "coarse": np.zeros((4, 4), np.int64)}
    for start in range(0, len(eval_ids), 32):
        f, m, ims = tile_data(eval_ids[start : start + 32])
        for kind, guide in (("refined", ims), ("coarse", None)):
            props = propose_tiles(
                res.head, f, mc_samples=settings.mc_samples, seed=seed, images=guide
            )
            for p, t in zip(props, m, strict=True):
                cm[kind] += confusion_matrix(t, p.mask, n_classes=4)
    for kind in ("refined", "coarse"):
        miou, iou = _iou_report(cm[kind], (0, 1, 2, 3))
        log(
            f"demo: 10 % ({n_train} tiles), {kind} -> mIoU {miou:.4f} on {len(eval_ids)} tiles, "
            f"per class {iou}"
        )
        suffix = "" if kind == "refined" else "_coarse"
        out[f"demo_miou_10pct{suffix}"] = round(miou, 4)
        out[f"demo_iou_per_class{suffix}"] = dict(
            zip(("soil", "crop", "weed", "symptom"), _round(iou), strict=True)
        )
    out["demo_tiles"] = {"train": int(n_train), "eval": len(eval_ids), "mode": res.mode}
    return out


# -- open datasets -------------------------------------------------------------------------------


def _soybean_truth(grey: np.ndarray, name: str) -> np.ndarray:
    # Prograf-UFF/asrdnet_dataset binary_mask: 255 = lesion (2+ of 3 expert votes), 0 = not
    g = grey[..., 0]
    if not np.isin(g, (0, 255)).all():
        raise ValueError(f"{name}: binary mask holds values other than 0 and 255")
    return np.where(g == 255, 3, 0).astype(np.uint8)


def run_split(
    name: str,
    pairs: list[tuple[str, Path, Path]],
    truth_fn: Callable[[np.ndarray, str], np.ndarray],
    classes: tuple[int, ...],
    n_train: int,
    *,
    encoder,
    cache: FeatureCache,
    settings: ModelSettings,
    seed: int,
    tiles_per_image: int,
    overlap: int,
) -> tuple[dict[str, np.ndarray], dict]:
    rng = np.random.default_rng(seed)
    order = rng.permutation(len(pairs))
    train_pairs = [pairs[i] for i in order[:n_train]]
    eval_pairs = [pairs[i] for i in order[n_train:]]
    feats, masks, pixels = [], [], []
    t0 = time.perf_counter()
    for k, (ident, image_path, label_path) in enumerate(train_pairs):
        src = TileSource(name, ident, read_image(image_path), overlap=overlap)
        truth = truth_fn(read_image(label_path), label_path.name)
        pick = sorted(
            rng.choice(
                len(src.windows), size=min(tiles_per_image, len(src.windows)), replace=False
            ).tolist()
        )
        feats += _features(cache, encoder, src, pick)
        masks += [np.array(truth[src.windows[i].slices]) for i in pick]
        pixels += src.tiles([src.keys[i] for i in pick])
        if (k + 1) % 25 == 0:
            log(f"{name}: encoded training image {k + 1}/{len(train_pairs)}")
    log(f"{name}: {len(masks)} training tiles ready in {time.perf_counter() - t0:.0f} s")
    res = _train(masks, feats, pixels, None, classes, settings, name)
    del feats, pixels
    n = max(classes) + 1
    cm = {"refined": np.zeros((n, n), np.int64), "coarse": np.zeros((n, n), np.int64)}
    t0 = time.perf_counter()
    for k, (ident, image_path, label_path) in enumerate(eval_pairs):
        image = read_image(image_path)
        src = TileSource(name, ident, image, overlap=overlap)
        truth = truth_fn(read_image(label_path), label_path.name)
        f = _features(cache, encoder, src, list(range(len(src.windows))))
        shapes = [(w.height, w.width) for w in src.windows]
        for kind, guide in (("refined", src.tiles(src.keys)), ("coarse", None)):
            props = propose_tiles(
                res.head,
                f,
                tile_shapes=shapes,
                mc_samples=settings.mc_samples,
                seed=seed,
                images=guide,
            )
            pred = stitch([p.mask for p in props], src.windows, shape=image.shape[:2])
            cm[kind] += confusion_matrix(truth, pred, n_classes=n)
        if (k + 1) % 25 == 0:
            log(f"{name}: evaluated image {k + 1}/{len(eval_pairs)}")
    log(f"{name}: evaluation in {time.perf_counter() - t0:.0f} s")
    info = {
        "train_images": len(train_pairs),
        "eval_images": len(eval_pairs),
        "train_tiles": res.n_train,
        "val_tiles": res.n_val,
        "best_epoch": res.best_epoch,
    }
    return cm, info


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--only", choices=("demo", "peanut", "soybean"), action="append")
    ap.add_argument("--cache", type=Path, help="keep features here (default: a temporary folder)")
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--threads", type=int, default=0)
    ap.add_argument("--epochs", type=int, default=ModelSettings().epochs)
    ap.add_argument("--train-tiles-per-image", type=int, default=4)
    args = ap.parse_args(argv)
    which = set(args.only or ("demo", "peanut", "soybean"))
    threads = configure_threads(args.threads)
    settings = ModelSettings(seed=args.seed, epochs=args.epochs)
    encoder = load_encoder()
    result: dict[str, object] = {
        "demo_cold_vegetation_iou": None,
        "demo_miou_10pct": None,
        "demo_iou_per_class": None,
        "open_miou": None,
        "open_iou_per_class": None,
        "lesion_iou": None,
    }
    reasons: dict[str, str] = {}
    info: dict[str, object] = {}
    t_start = time.perf_counter()
    with tempfile.TemporaryDirectory(prefix="labeler-quality-") as tmp:
        folder = args.cache if args.cache is not None else Path(tmp)
        cache = FeatureCache(folder, encoder_version=encoder.version)
        if "demo" in which:
            demo = run_demo(encoder, cache, settings, args.seed)
            if "reason" in demo:
                reasons["demo"] = str(demo["reason"])
            else:
                info["demo"] = demo.pop("demo_tiles")
                result.update(demo)
        if "peanut" in which:
            if not (PEANUT / "images").is_dir():
                reasons["open"] = absent_reason(PEANUT, expected="images/")
            else:
                pairs = [
                    (p.stem, p, PEANUT / "labels" / f"{p.stem}.png")
                    for p in sorted((PEANUT / "images").glob("*.jpg"))
                ]
                cm, info["peanut"] = run_split(
                    "peanut",
                    pairs,
                    peanut_truth,
                    (0, 1, 2),
                    300,
                    encoder=encoder,
                    cache=cache,
                    settings=settings,
                    seed=args.seed,
                    tiles_per_image=args.train_tiles_per_image,
                    overlap=0,
                )
                for kind, suffix in (("refined", ""), ("coarse", "_coarse")):
                    miou, iou = _iou_report(cm[kind], (0, 1, 2))
                    result[f"open_miou{suffix}"] = round(miou, 4)
                    result[f"open_iou_per_class{suffix}"] = dict(
                        zip(("soil", "crop", "weed"), _round(iou), strict=True)
                    )
        if "soybean" in which:
            if not (SOYBEAN / "original_images").is_dir():
                reasons["lesion"] = absent_reason(SOYBEAN, expected="original_images/")
            else:
                pairs = [
                    (
                        f"image{n}",
                        SOYBEAN / "original_images" / f"image{n}.jpeg",
                        SOYBEAN / "binary_mask" / f"image{n}.png",
                    )
                    for n in range(1, 64)
                ]
                cm, info["soybean"] = run_split(
                    "soybean",
                    pairs,
                    _soybean_truth,
                    (0, 3),
                    48,
                    encoder=encoder,
                    cache=cache,
                    settings=settings,
                    seed=args.seed,
                    tiles_per_image=args.train_tiles_per_image,
                    overlap=0,
                )
                result["lesion_iou"] = round(float(iou_per_class(cm["refined"])[3]), 4)
                result["lesion_iou_coarse"] = round(float(iou_per_class(cm["coarse"])[3]), 4)
    result["reasons"] = reasons
    result["context"] = {
        "seed": args.seed,
        "threads": threads,
        "epochs_max": args.epochs,
        "train_tiles_per_image": args.train_tiles_per_image,
        "tile": TILE,
        "seconds": round(time.perf_counter() - t_start, 1),
        "load_avg_1min": round(os.getloadavg()[0], 2),
        **info,
    }
    print(json.dumps(result))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
