"""Does adapting the encoder to the project's tiles help? mIoU with few labels per start.

Run from the repository root: ``python -m benchmarks.adaptation_gain`` (``--help`` lists
the options; ``--quick`` is a reduced run). For each data set, the pool tiles are put in
a fresh project and ``labeler adapt`` runs on them as the user would (the workflow stage
:func:`labeler.workflow.adapt`, its time budget counting the whole command) once per
method; on the demo also with the same plots seen again two weeks later
(:mod:`labeler.demo.revisit`), whose revisit pairs are then positives. Then, for every
encoder start, share of labelled pool tiles and seed, a head is trained on that share
(a seeded draw, at least 3 tiles; the project's default training settings, so the same
training budget for every start) and measured on the held-out tiles (one confusion
matrix over all of them, mIoU of Long, Shelhamer & Darrell 2015).

Encoder starts:

``random``              EfficientNet-Lite0 with random weights (frozen)
``imagenet_frozen``     the ImageNet-1k weights, frozen (the head learns alone)
``imagenet_finetuned``  ImageNet-1k, the last two stages fine-tuned with the head
``adapted_<method>``    adapted with ``labeler adapt --method <method>``, frozen
``adapted_<method>_revisits``  the same with the later visits in the project (demo)
``adapted_finetuned``   adapted (dense; with revisits on the demo), then fine-tuned

Data sets: ``demo`` (the committed invented Brackenlow Farm plots, two whole plots held
out, as :mod:`benchmarks.label_efficiency.loading`) and ``peanut`` (a seeded subset of
the peanut photos, public GitHub repository ``ptdkhoa/Peanut-dataset``; Tran & Phan,
IEEE Access 11, 82640-82651, 2023; CC BY-SA 4.0; read in place, skipped when absent).

Prints one JSON line per data set: ``dataset``, ``miou`` as {start: {share: mean}},
``miou_sd`` (same layout, sample standard deviation over seeds, null for one seed),
``adapt_minutes`` ({run: minutes the command took}), and the settings and machine load;
writes ``<out>/adaptation_gain.json`` and ``<out>/adaptation_gain.png``.

Masks are decision support only: spraying and fungicide decisions follow local
regulations and licensed agronomic advice.
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import tempfile
import time
from datetime import date
from pathlib import Path

import numpy as np

from benchmarks.datasets import PEANUT
from benchmarks.label_efficiency.loading import DEMO, load_demo, load_peanut

__all__ = ["STARTS", "main", "label_rows", "summarise", "feature_spread"]

REPO = Path(__file__).resolve().parents[1]
#: Every encoder start, in plot order.
STARTS = (
    "random",
    "imagenet_frozen",
    "imagenet_finetuned",
    "adapted_dense",
    "adapted_image",
    "adapted_dense_revisits",
    "adapted_image_revisits",
    "adapted_finetuned",
)
FIRST, LATER = date(2027, 5, 14), date(2027, 5, 28)


def label_rows(n_pool: int, share: float, seed: int, *, least: int = 3) -> np.ndarray:
    """Seeded draw of the labelled pool rows: ``round(share * n_pool)``, at least ``least``."""
    k = min(n_pool, max(least, int(round(share * n_pool))))
    return np.sort(np.random.default_rng(seed).choice(n_pool, k, replace=False))


def summarise(values: dict) -> tuple[dict, dict]:
    """{start: {share: [mIoU per seed]}} -> means and sample standard deviations (4 places)."""
    mean = {s: {k: round(float(np.mean(v)), 4) for k, v in d.items()} for s, d in values.items()}
    sd = {
        s: {k: (round(float(np.std(v, ddof=1)), 4) if len(v) > 1 else None) for k, v in d.items()}
        for s, d in values.items()
    }
    return mean, sd


def _say(text: str) -> None:
    print(f"[{time.strftime('%H:%M:%S')}] {text}", file=sys.stderr, flush=True)


# -- adaptation through the workflow -----------------------------------------------------------
def _adapt_project(root: Path, files: list[Path], *, later: list[Path], overlap: int):
    from labeler.project import init_project, open_project
    from labeler.workflow import add_images

    init_project(root).close()
    (root / "labeler.toml").write_text(f"[tiles]\nsize = 256\noverlap = {overlap}\n")
    project = open_project(root)
    add_images(project, files, captured=FIRST, copy=False)
    if later:
        add_images(project, later, captured=LATER, copy=False)
    return project


def _later_visits(plots: list[str], folder: Path) -> list[Path]:
    """The demo pool plots seen again two weeks later (same ground as the committed ones)."""
    from labeler.demo.fields import DEFAULT_SEED, DEFAULT_SIZE, PLOT_NAMES, plot_seed
    from labeler.demo.revisit import make_revisit
    from labeler.imagery.write import write_geotiff

    out = []
    for name in plots:
        seed = plot_seed(DEFAULT_SEED, PLOT_NAMES.index(name))
        plot = make_revisit(name, seed=seed, height=DEFAULT_SIZE[0], width=DEFAULT_SIZE[1])
        out.append(
            write_geotiff(
                folder / f"{name}-later.tif", plot.image, transform=plot.transform,
                crs=plot.crs, compress="jpeg", jpeg_quality=95,
            )
        )
    return out


def _adapt_runs(
    dataset, files, *, work: Path, names, minutes, revisit_files, overlap, seed, max_steps=None
):
    """Run ``labeler adapt`` for each adapted start named; weights and minutes per run."""
    from labeler.workflow import adapt
    from labeler.workflow.encoders import load_encoder_version

    runs, took, detail = {}, {}, {}
    variants = [(m, r) for r in (False, True) for m in ("dense", "image")]
    for method, with_later in variants:
        name = f"adapted_{method}" + ("_revisits" if with_later else "")
        if name not in names or (with_later and not revisit_files):
            continue
        root = work / f"{dataset}-{name}"
        project = _adapt_project(
            root, files, later=revisit_files if with_later else [], overlap=overlap
        )
        try:
            started = time.monotonic()
            out = adapt(project, minutes=minutes, method=method, seed=seed, max_steps=max_steps)
            took[name] = round((time.monotonic() - started) / 60.0, 2)
            runs[name] = load_encoder_version(project, out.encoder.name)
            detail[name] = {
                "steps": out.steps,
                "tiles": out.tiles,
                "revisit_pairs": out.revisit_pairs,
                "seconds": round(out.seconds, 1),
                "stopped": out.stopped,
                "first_loss": round(out.first_loss, 4),
                "last_loss": round(out.last_loss, 4),
            }
            _say(
                f"{dataset}: {name}: {out.steps} steps, loss {out.first_loss:.3f} -> "
                f"{out.last_loss:.3f}, {out.revisit_pairs} revisit pairs, {took[name]} min"
            )
        finally:
            project.close()
    return runs, took, detail


def feature_spread(features) -> float:
    """Collapse check: mean over channels of the standard deviation, across tiles, of the
    L2-normalised pooled deepest features (0 for a collapsed encoder; about
    ``1 / sqrt(channels)`` for evenly spread ones; common practice, no source).

    Parameters
    ----------
    features : sequence of tuples of arrays
        Per tile the feature maps, the deepest last, each (C, h, w).
    """
    pooled = np.stack([np.asarray(f[-1], np.float32).mean(axis=(1, 2)) for f in features])
    unit = pooled / np.maximum(np.linalg.norm(pooled, axis=1, keepdims=True), 1e-12)
    return round(float(unit.std(axis=0).mean()), 5)


# -- heads -------------------------------------------------------------------------------------
def _miou(head, tail, heldout, *, n_classes: int, mc_samples: int) -> float:
    from labeler.metrics import confusion_matrix, mean_iou
    from labeler.model.predict import propose_tiles
    from labeler.model.tail import tail_features

    cm = np.zeros((n_classes, n_classes), np.int64)
    for start in range(0, len(heldout), 32):
        rows = range(start, min(start + 32, len(heldout)))
        feats = [heldout.features[r] for r in rows]
        if tail is not None:
            feats = tail_features(tail, feats)
        props = propose_tiles(
            head, feats, tile_shapes=[heldout.shapes[r] for r in rows], mc_samples=mc_samples,
            seed=0, images=[heldout.images[r] for r in rows],
        )
        for r, p in zip(rows, props, strict=True):
            cm += confusion_matrix(heldout.masks[r], p.mask, n_classes=n_classes)
    return mean_iou(cm)


def _curves(
    pool, heldout, *, encoder, finetune, shares, seeds, classes, settings, mc_samples,
    steps=None,
):
    from labeler.model.train import train_head

    out: dict[str, list[float]] = {}
    for share in shares:
        for seed in seeds:
            rows = label_rows(len(pool), share, seed)
            res = train_head(
                [pool.masks[r] for r in rows],
                class_indices=classes,
                features=[pool.features[r] for r in rows],
                images=[pool.images[r] for r in rows],
                encoder=encoder,
                settings=settings,
                mode="features",
                finetune_stages=finetune,
                steps=steps,
            )
            miou = _miou(res.head, res.tail, heldout, n_classes=len(classes), mc_samples=mc_samples)
            out.setdefault(f"{share:g}", []).append(round(float(miou), 4))
    return out


def _random_encoder(seed: int):
    import torch

    from labeler.model.encoder import Lite0Encoder

    torch.manual_seed(seed)
    torch.set_flush_denormal(True)  # random weights shrink activations into slow denormals
    enc = Lite0Encoder()
    enc.version = f"lite0-random-s{seed}"
    return enc


def run_dataset(name: str, args, work: Path) -> dict:
    """Adapt, encode and train for one data set; the JSON line's dict."""
    from labeler.model.cache import FeatureCache
    from labeler.model.encoder import load_encoder
    from labeler.settings import ModelSettings

    load_start = round(os.getloadavg()[0], 2)
    settings = ModelSettings(mc_samples=args.mc_samples)
    cache_root = work / "features"
    imagenet = load_encoder()

    def load(encoder):
        cache = FeatureCache(cache_root, encoder_version=encoder.version)
        if name == "demo":
            return load_demo(encoder=encoder, cache=cache)
        return load_peanut(
            encoder=encoder, cache=cache, pool_images=args.peanut_pool_images,
            heldout_images=args.peanut_heldout_images,
        )

    pool, heldout, info = load(imagenet)
    classes = tuple(range(len(info["classes"])))
    if name == "demo":
        files = [DEMO / f"{p}.tif" for p in info["pool_plots"]]
        later = _later_visits(info["pool_plots"], work) if args.revisits else []
        overlap = 32
    else:
        files = [PEANUT / "images" / f"{p}.jpg" for p in info["pool_images"]]
        later, overlap = [], 0
    wanted = [s for s in STARTS if s in args.starts]
    best_adapted = "adapted_dense_revisits" if later else "adapted_dense"
    runs = {s for s in wanted if s.startswith("adapted_") and s != "adapted_finetuned"}
    if "adapted_finetuned" in wanted:
        runs.add(best_adapted)
    values: dict[str, dict[str, list[float]]] = {}
    encoders: dict = {}
    took: dict = {}
    detail: dict = {}
    spread: dict = {}
    seconds: dict = {}
    for start in wanted:
        if start.startswith("adapted") and not took and runs:
            # the starts without adaptation come first in STARTS: a fault shows early
            encoders, took, detail = _adapt_runs(
                name, files, work=work, names=runs, minutes=args.minutes,
                revisit_files=later, overlap=overlap, seed=0, max_steps=args.adapt_steps,
            )
        tuned = args.finetune_stages
        if start == "random":
            enc, finetune = _random_encoder(0), 0
        elif start.startswith("imagenet"):
            enc, finetune = imagenet, tuned if start.endswith("finetuned") else 0
        elif start == "adapted_finetuned":
            enc, finetune = encoders.get(best_adapted), tuned
        else:
            enc, finetune = encoders.get(start), 0
        if enc is None:
            continue  # e.g. revisit starts on a data set without revisits
        p, h, _ = load(enc) if enc is not imagenet else (pool, heldout, info)
        t0 = time.monotonic()
        values[start] = _curves(
            p, h, encoder=enc, finetune=finetune, shares=args.shares, seeds=args.seeds,
            classes=classes, settings=settings, mc_samples=args.mc_samples,
            steps=args.head_steps,
        )
        spread[start] = feature_spread(h.features)
        seconds[start] = round(time.monotonic() - t0, 1)
        _say(f"{name}: {start}: {values[start]} ({seconds[start]:.0f} s)")
    mean, sd = summarise(values)
    return {
        "dataset": name,
        "miou": mean,
        "miou_sd": sd,
        "adapt_minutes": took,
        "adapt_budget_minutes": args.minutes,
        "adapt_max_steps": args.adapt_steps,
        "adapt_runs": detail,
        "finetune_stages": args.finetune_stages,
        "head_steps": args.head_steps,  # None: the project's default step budget
        "feature_spread": spread,
        "head_seconds": seconds,
        "adapted_finetuned_from": best_adapted,
        "shares": [float(s) for s in args.shares],
        "seeds": list(args.seeds),
        "pool_tiles": len(pool),
        "heldout_tiles": len(heldout),
        "reduced": bool(
            args.quick
            or args.minutes < 10
            or args.adapt_steps is not None
            or args.head_steps is not None
            or len(args.seeds) < 3
            or len(args.shares) < 3
            or set(wanted) != set(STARTS)
        ),
        "load_average_1min": [load_start, round(os.getloadavg()[0], 2)],  # at start, at end
    }


def plot(results: list[dict], path: Path) -> Path:
    """mIoU against the labelled share, one line per start, one panel per data set."""
    import io

    import matplotlib

    matplotlib.use("Agg")
    from matplotlib import pyplot as plt

    from labeler.fileio import atomic_write_bytes

    fig, axes = plt.subplots(1, len(results), figsize=(6 * len(results), 4.2), squeeze=False)
    for ax, res in zip(axes[0], results, strict=True):
        n = len(res["miou"])
        for i, (start, by_share) in enumerate(res["miou"].items()):
            xs = sorted(by_share, key=float)
            ys = [by_share[x] for x in xs]
            err = [res["miou_sd"][start][x] or 0.0 for x in xs]
            dodge = 0.3 * (i - (n - 1) / 2)  # percentage points: error bars side by side
            ax.errorbar([100 * float(x) + dodge for x in xs], ys, yerr=err, marker="o",
                        capsize=3, label=start)
        ax.set_title(f"{res['dataset']} (adaptation budget {res['adapt_budget_minutes']:g} min)")
        ax.set_xlabel("pool tiles labelled (%)")
        ax.set_ylabel("held-out mIoU")
        ax.grid(alpha=0.3)
        ax.legend(fontsize=7)
    fig.tight_layout()
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=110)
    plt.close(fig)
    return atomic_write_bytes(path, buf.getvalue())


def _floats(text: str) -> list[float]:
    return [float(v) for v in text.split(",") if v.strip()]


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(
        prog="python -m benchmarks.adaptation_gain",
        description="mIoU with 5/10/25 %% of the pool labelled, per encoder start "
        "(random, ImageNet frozen or fine-tuned, adapted by 'labeler adapt').",
    )
    parser.add_argument("--datasets", default="demo,peanut", help="comma list (default: %(default)s)")
    parser.add_argument("--shares", type=_floats, default=[0.05, 0.10, 0.25])
    parser.add_argument("--seeds", type=lambda t: [int(v) for v in t.split(",")], default=[0, 1, 2])
    parser.add_argument("--minutes", type=float, default=10.0, help="adaptation budget per run")
    parser.add_argument("--starts", default=",".join(STARTS), help="comma list of encoder starts")
    parser.add_argument("--no-revisits", dest="revisits", action="store_false")
    parser.add_argument(
        "--adapt-steps", type=int, default=None,
        help="also stop each adaptation after this many optimiser steps (default: time only)",
    )
    parser.add_argument(
        "--finetune-stages", type=int, choices=(2, 4), default=2,
        help="encoder stages the fine-tuned starts train with the head (default: %(default)s)",
    )
    parser.add_argument(
        "--head-steps", type=int, default=None,
        help="most optimiser steps of every head; model.epochs and early stopping can end it "
        "sooner (default: the project's step budget)",
    )
    parser.add_argument("--mc-samples", type=int, default=2, help="dropout passes when measuring")
    parser.add_argument("--peanut-pool-images", type=int, default=16)
    parser.add_argument("--peanut-heldout-images", type=int, default=6)
    parser.add_argument("--out", type=Path, default=REPO / "docs", help="where the JSON and PNG go")
    parser.add_argument(
        "--quick", action="store_true",
        help="reduced run: shares 0.05,0.25, seed 0, 2-minute adaptations",
    )
    args = parser.parse_args(argv)
    if args.quick:
        args.shares, args.seeds, args.minutes = [0.05, 0.25], [0], min(args.minutes, 2.0)
    args.starts = [s.strip() for s in args.starts.split(",") if s.strip()]
    unknown = sorted(set(args.starts) - set(STARTS))
    if unknown:
        parser.error(f"--starts: unknown {unknown}; choose among {', '.join(STARTS)}")
    results = []
    with tempfile.TemporaryDirectory(prefix="adaptation-gain-") as tmp:
        for name in [d.strip() for d in args.datasets.split(",") if d.strip()]:
            try:
                res = run_dataset(name, args, Path(tmp))
            except FileNotFoundError as exc:
                res = {"dataset": name, "skipped": str(exc)}
            print(json.dumps(res), flush=True)
            results.append(res)
    done = [r for r in results if "miou" in r]
    if done:
        from labeler.fileio import atomic_write_text

        atomic_write_text(args.out / "adaptation_gain.json", json.dumps(results, indent=2) + "\n")
        plot(done, args.out / "adaptation_gain.png")
    return 0


if __name__ == "__main__":
    sys.exit(main())
