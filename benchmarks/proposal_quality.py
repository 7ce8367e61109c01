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

The head is trained as ``labeler retrain`` trains it (``labeler.model.fit.fit_head``: the
exact flips and turns of the training tiles encoded once into the feature cache, a step
budget that grows sub-linearly with the tiles, the tiles' pixels for the full-resolution
refinement, ``labeler.model.refine``), with the default settings for the keys above, and
again with the last encoder stages fine-tuned on the labels (``model.finetune_stages``,
``--finetune-stages``; ``labeler.model.tail``) for the keys ``demo_miou_10pct_finetuned``,
``open_miou_finetuned`` and ``lesion_iou_finetuned``. ``demo_train_s``, ``open_train_s``
and ``lesion_train_s`` (each also ``_finetuned``) are the seconds of each training,
encoding of the turned tiles included. Every figure is given
for the mask as ``labeler propose`` makes it from the tile's pixels (the refined logits,
``propose_tiles(images=...)``) and, under keys ending ``_coarse``, for the same head's
stride-4 probabilities upsampled bilinearly (the mask without the refinement, as
``propose_tiles`` makes it when no pixels are given).

The open datasets are read in place from the open-dataset folder
(:data:`benchmarks.datasets.DATASETS`, outside the repository) and never copied; a
missing dataset gives null with a reason under ``reasons``. Features are cached in a
temporary folder (``--cache`` keeps them between runs). The encoder is the
ImageNet-1k EfficientNet-Lite0. Training on the open
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
from dataclasses import replace
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
from labeler.model.fit import fit_head  # noqa: E402
from labeler.model.predict import propose_tiles  # noqa: E402
from labeler.model.runtime import configure_threads  # noqa: E402
from labeler.model.tail import tail_features  # noqa: E402
from labeler.settings import ModelSettings  # noqa: E402

DEMO = REPO / "demo_fields"
TILE = 256
#: Encoder stages fine-tuned for the ``_finetuned`` keys (``--finetune-stages``).
FINETUNED_STAGES = 2


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


def _train(masks, images, keys, cache, encoder, classes, settings: ModelSettings, label: str):
    """Train as ``labeler retrain`` does; returns the result and the seconds it took."""
    t0 = time.perf_counter()

    def progress(step: int, total: int, m: dict) -> None:
        log(
            f"{label}: epoch {m['epoch']:.0f}, step {step}/{total} train {m['train_loss']:.4f} "
            f"val {m['val_loss']:.4f} mIoU {m['val_miou']:.3f}"
        )

    res = fit_head(
        masks,
        images,
        keys,
        class_indices=classes,
        cache=cache,
        encoder=encoder,
        settings=settings,
        progress=progress,
    )
    seconds = time.perf_counter() - t0
    log(
        f"{label}: trained in {seconds:.0f} s, mode {res.mode}, {res.steps}/{res.budget} steps, "
        f"best epoch {res.best_epoch}, {res.n_train} train / {res.n_val} val tiles"
    )
    return res, seconds


def _eval_features(res, feats):
    """The features the trained head reads: the cached ones, through the tuned tail if any."""
    return feats if res.tail is None else tail_features(res.tail, feats)


# -- demo scenario -------------------------------------------------------------------------------
def run_demo(
    encoder, cache: FeatureCache, variants: list[tuple[str, ModelSettings]], seed: int
) -> dict:
    settings = variants[0][1]
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

    _, masks, ims = tile_data(train_ids)
    keys = [items[k][0].keys[items[k][2]] for k in train_ids]
    for suffix, variant in variants:
        res, seconds = _train(
            masks, ims, keys, cache, encoder, (0, 1, 2, 3), variant, "demo" + suffix
        )
        out[f"demo_train_s{suffix}"] = round(seconds, 1)
        cm = {"refined": np.zeros((4, 4), np.int64), "coarse": np.zeros((4, 4), np.int64)}
        for start in range(0, len(eval_ids), 32):
            f, m, eims = tile_data(eval_ids[start : start + 32])
            f = _eval_features(res, f)
            kinds = (("refined", eims), ("coarse", None)) if not suffix else (("refined", eims),)
            for kind, guide in kinds:
                props = propose_tiles(
                    res.head, f, mc_samples=settings.mc_samples, seed=seed, images=guide
                )
                for p, t in zip(props, m, strict=True):
                    cm[kind] += confusion_matrix(t, p.mask, n_classes=4)
        for kind in ("refined", "coarse") if not suffix else ("refined",):
            miou, iou = _iou_report(cm[kind], (0, 1, 2, 3))
            log(
                f"demo{suffix}: 10 % ({n_train} tiles), {kind} -> mIoU {miou:.4f} on "
                f"{len(eval_ids)} tiles, per class {iou}"
            )
            tag = suffix + ("" if kind == "refined" else "_coarse")
            out[f"demo_miou_10pct{tag}"] = round(miou, 4)
            out[f"demo_iou_per_class{tag}"] = dict(
                zip(("soil", "crop", "weed", "symptom"), _round(iou), strict=True)
            )
        out[f"demo_tiles{suffix}"] = {
            "train": int(n_train),
            "eval": len(eval_ids),
            "mode": res.mode,
            "steps": res.steps,
            "best_epoch": res.best_epoch,
        }
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
    variants: list[tuple[str, ModelSettings]],
    seed: int,
    tiles_per_image: int,
    overlap: int,
) -> dict[str, tuple[dict[str, np.ndarray], dict]]:
    """Train each variant on the training split, score all on the evaluation images.

    Returns ``{suffix: (confusion matrices by kind, info)}``; the coarse matrix only for
    the first (default) variant.
    """
    rng = np.random.default_rng(seed)
    order = rng.permutation(len(pairs))
    train_pairs = [pairs[i] for i in order[:n_train]]
    eval_pairs = [pairs[i] for i in order[n_train:]]
    keys, masks, pixels = [], [], []
    t0 = time.perf_counter()
    for ident, image_path, label_path in train_pairs:
        src = TileSource(name, ident, read_image(image_path), overlap=overlap)
        truth = truth_fn(read_image(label_path), label_path.name)
        pick = sorted(
            rng.choice(
                len(src.windows), size=min(tiles_per_image, len(src.windows)), replace=False
            ).tolist()
        )
        keys += [src.keys[i] for i in pick]
        masks += [np.array(truth[src.windows[i].slices]) for i in pick]
        pixels += src.tiles([src.keys[i] for i in pick])
    log(f"{name}: {len(masks)} training tiles read in {time.perf_counter() - t0:.0f} s")
    trained = []
    for suffix, variant in variants:
        res, seconds = _train(masks, pixels, keys, cache, encoder, classes, variant, name + suffix)
        trained.append((suffix, res, seconds))
    del pixels
    n = max(classes) + 1
    cms = {
        suffix: {"refined": np.zeros((n, n), np.int64), "coarse": np.zeros((n, n), np.int64)}
        for suffix, _, _ in trained
    }
    mc = variants[0][1].mc_samples
    t0 = time.perf_counter()
    for k, (ident, image_path, label_path) in enumerate(eval_pairs):
        image = read_image(image_path)
        src = TileSource(name, ident, image, overlap=overlap)
        truth = truth_fn(read_image(label_path), label_path.name)
        base = _features(cache, encoder, src, list(range(len(src.windows))))
        shapes = [(w.height, w.width) for w in src.windows]
        for suffix, res, _ in trained:
            f = _eval_features(res, base)
            kinds = (("refined", src.tiles(src.keys)), ("coarse", None))
            for kind, guide in kinds if not suffix else kinds[:1]:
                props = propose_tiles(
                    res.head, f, tile_shapes=shapes, mc_samples=mc, seed=seed, images=guide
                )
                pred = stitch([p.mask for p in props], src.windows, shape=image.shape[:2])
                cms[suffix][kind] += confusion_matrix(truth, pred, n_classes=n)
        if (k + 1) % 25 == 0:
            log(f"{name}: evaluated image {k + 1}/{len(eval_pairs)}")
    log(f"{name}: evaluation in {time.perf_counter() - t0:.0f} s")
    out = {}
    for suffix, res, seconds in trained:
        out[suffix] = (
            cms[suffix],
            {
                "train_images": len(train_pairs),
                "eval_images": len(eval_pairs),
                "train_tiles": res.n_train,
                "val_tiles": res.n_val,
                "best_epoch": res.best_epoch,
                "steps": res.steps,
                "mode": res.mode,
                "train_s": round(seconds, 1),
            },
        )
    return out


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--only", choices=("demo", "peanut", "soybean"), action="append")
    ap.add_argument("--cache", type=Path, help="keep features here (default: a temporary folder)")
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--threads", type=int, default=0)
    ap.add_argument("--epochs", type=int, default=ModelSettings().epochs)
    ap.add_argument("--train-tiles-per-image", type=int, default=4)
    ap.add_argument(
        "--finetune-stages",
        type=int,
        choices=(2, 4),
        default=FINETUNED_STAGES,
        help="encoder stages trained with the head for the _finetuned keys",
    )
    ap.add_argument(
        "--skip-finetuned", action="store_true", help="leave the _finetuned keys out (faster)"
    )
    args = ap.parse_args(argv)
    which = set(args.only or ("demo", "peanut", "soybean"))
    threads = configure_threads(args.threads)
    settings = ModelSettings(seed=args.seed, epochs=args.epochs)
    variants = [("", settings)]
    if not args.skip_finetuned:
        variants.append(("_finetuned", replace(settings, finetune_stages=args.finetune_stages)))
    encoder = load_encoder()
    result: dict[str, object] = {
        "demo_cold_vegetation_iou": None,
        "demo_miou_10pct": None,
        "demo_iou_per_class": None,
        "open_miou": None,
        "open_iou_per_class": None,
        "lesion_iou": None,
        "demo_miou_10pct_finetuned": None,
        "open_miou_finetuned": None,
        "lesion_iou_finetuned": None,
    }
    reasons: dict[str, str] = {}
    info: dict[str, object] = {}
    t_start = time.perf_counter()
    with tempfile.TemporaryDirectory(prefix="labeler-quality-") as tmp:
        folder = args.cache if args.cache is not None else Path(tmp)
        cache = FeatureCache(folder, encoder_version=encoder.version)
        if "demo" in which:
            demo = run_demo(encoder, cache, variants, args.seed)
            if "reason" in demo:
                reasons["demo"] = str(demo["reason"])
            else:
                for suffix, _ in variants:
                    info["demo" + suffix] = demo.pop("demo_tiles" + suffix)
                result.update(demo)
        if "peanut" in which:
            if not (PEANUT / "images").is_dir():
                reasons["open"] = absent_reason(PEANUT, expected="images/")
            else:
                pairs = [
                    (p.stem, p, PEANUT / "labels" / f"{p.stem}.png")
                    for p in sorted((PEANUT / "images").glob("*.jpg"))
                ]
                runs = run_split(
                    "peanut",
                    pairs,
                    peanut_truth,
                    (0, 1, 2),
                    300,
                    encoder=encoder,
                    cache=cache,
                    variants=variants,
                    seed=args.seed,
                    tiles_per_image=args.train_tiles_per_image,
                    overlap=0,
                )
                for suffix, (cm, run_info) in runs.items():
                    info["peanut" + suffix] = run_info
                    result["open_train_s" + suffix] = run_info["train_s"]
                    for kind, tag in (("refined", ""), ("coarse", "_coarse")):
                        if kind == "coarse" and suffix:
                            continue
                        miou, iou = _iou_report(cm[kind], (0, 1, 2))
                        result[f"open_miou{suffix}{tag}"] = round(miou, 4)
                        result[f"open_iou_per_class{suffix}{tag}"] = dict(
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
                runs = run_split(
                    "soybean",
                    pairs,
                    _soybean_truth,
                    (0, 3),
                    48,
                    encoder=encoder,
                    cache=cache,
                    variants=variants,
                    seed=args.seed,
                    tiles_per_image=args.train_tiles_per_image,
                    overlap=0,
                )
                for suffix, (cm, run_info) in runs.items():
                    info["soybean" + suffix] = run_info
                    result["lesion_train_s" + suffix] = run_info["train_s"]
                    result["lesion_iou" + suffix] = round(float(iou_per_class(cm["refined"])[3]), 4)
                    if not suffix:
                        result["lesion_iou_coarse"] = round(
                            float(iou_per_class(cm["coarse"])[3]), 4
                        )
    result["reasons"] = reasons
    result["context"] = {
        "seed": args.seed,
        "threads": threads,
        "epochs_max": args.epochs,
        "finetune_stages": {suffix or "default": v.finetune_stages for suffix, v in variants},
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
