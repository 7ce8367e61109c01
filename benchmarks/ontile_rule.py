"""Learning on the tile: what the re-fit adds to an annotator's corrections, and its ceiling.

Run from the repository root: ``python -m benchmarks.ontile_rule`` (``--help`` for the
options). One JSON line on standard output.

What is measured
    A head is trained as ``labeler retrain`` trains it (the project's defaults) on
    ``--share`` of the pool of ``--dataset`` (the demo plots, or the peanut photos read in
    place from the open-dataset folder, Tran & Phan 2023, CC BY-SA 4.0), picked by
    ``coreset`` on the encoder embeddings as the product's first pick
    (:mod:`benchmarks.annotation_effort`). On ``--tiles`` held-out
    tiles (a seeded sample) a simulated annotator then makes ``--clicks`` corrections,
    each a disk of the truth class at the interior point of the largest error region
    (:func:`labeler.demo.clicks.next_click`, the protocol of Xu et al. 2016, "Deep
    Interactive Object Selection", CVPR), radius the interior depth less half a pixel,
    kept inside the truth class. After each correction the tile's mask is, in turn:

    * ``marks_only``: the head's proposal with the corrected pixels;
    * ``fit_whole``: the on-tile re-fit on the corrections taken at every pixel
      (:class:`labeler.model.ontile.TileLearner` with ``look_alike=False``);
    * ``look_alike_rule``: the re-fit as the editor applies it (the defaults).

    Each way follows its own masks (the next click goes where its own largest error is).
    The JSON line gives the mean gain of tile IoU (:func:`labeler.demo.effort.tile_iou`)
    over the proposal for each way, the tiles where the rule did worse than the marks
    alone, and ``ceiling``: the tile IoU the residual classifier reaches when fitted to the
    tile's truth at every 16th pixel (a 4-pixel grid: 4 096 marks on a 256 x 256 tile;
    300 steps, no prior, taken whole), scored on the pixels not marked, against the
    proposal's; when the ceiling is low, no set of marks can make the re-fit fix the tile.

Masks are decision support only: where they drive spraying or fungicide decisions, local
regulations and licensed agronomic advice come first.
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

__all__ = ["WAYS", "disk_correction", "session_gains", "main"]

#: The ways a tile's mask follows the corrections (see the module notes).
WAYS = ("marks_only", "fit_whole", "look_alike_rule")


def disk_correction(truth: np.ndarray, mask: np.ndarray) -> np.ndarray | None:
    """The next correction: a disk of the truth class at the protocol's click.

    Parameters
    ----------
    truth, mask : ndarray, shape (H, W), uint8

    Returns
    -------
    marks : ndarray, shape (H, W), uint8 or None
        The class where the disk falls inside that class of the truth, 255 elsewhere;
        None when the mask equals the truth.
    """
    from labeler.demo.clicks import footprint, next_click

    click = next_click(truth, mask)
    if click is None:
        return None
    point = (float(click.point[0]), float(click.point[1]))
    radius = max(click.depth_px - 0.5, 0.5)  # what the editor's brush paints there
    inside = footprint([point], radius, truth.shape) & (truth == click.cls)
    out = np.full(truth.shape, 255, np.uint8)
    out[inside] = click.cls
    return out


def session_gains(truth: np.ndarray, learners: dict, *, clicks: int, n_classes: int) -> dict:
    """Tile IoU gained after ``clicks`` corrections, for each way of :data:`WAYS`.

    Parameters
    ----------
    truth : ndarray, shape (H, W), uint8
    learners : dict
        ``"fit_whole"`` and ``"look_alike_rule"``: a :class:`TileLearner` each (same head
        and tile); the proposal is the rule's learner's.
    clicks : int
    n_classes : int

    Returns
    -------
    dict
        Way -> IoU after the session less the proposal's.
    """
    from labeler.demo.effort import tile_iou

    base = learners["look_alike_rule"].proposal()
    start = tile_iou(truth, base, n_classes=n_classes)
    out = {}
    for way in WAYS:
        marks = np.full(truth.shape, 255, np.uint8)
        mask = base.copy()
        for _ in range(clicks):
            new = disk_correction(truth, mask)
            if new is None:
                break
            marks[new != 255] = new[new != 255]
            if way == "marks_only":
                mask = np.where(marks != 255, marks, base).astype(np.uint8)
            else:
                mask = learners[way].fit(marks)
        out[way] = tile_iou(truth, mask, n_classes=n_classes) - start
    return out


def main(argv: list[str] | None = None) -> int:
    """Command line: train, run the sessions, print one JSON line."""
    ap = argparse.ArgumentParser(prog="python -m benchmarks.ontile_rule",
                                 description=__doc__.split("\n")[0])
    ap.add_argument("--dataset", choices=("demo", "peanut"), default="demo")
    ap.add_argument("--share", type=float, default=0.10, help="share of the pool labelled")
    ap.add_argument("--tiles", type=int, default=12, help="held-out tiles measured")
    ap.add_argument("--clicks", type=int, default=5, help="corrections per tile")
    ap.add_argument("--threads", type=int, default=1, help="torch threads (0: all cores)")
    args = ap.parse_args(argv)
    if not 0 < args.share <= 1 or args.tiles < 1 or args.clicks < 1:
        ap.error("--share must be in (0, 1], --tiles and --clicks at least 1")
    from benchmarks.annotation_effort import _heads_in_picker_order, _load, picked_counts
    from labeler.demo.effort import tile_iou
    from labeler.model.cache import FeatureCache
    from labeler.model.encoder import load_encoder
    from labeler.model.ontile import OnTileOptions, TileLearner
    from labeler.model.runtime import configure_threads

    threads = configure_threads(args.threads)
    encoder = load_encoder()
    t0, load0 = time.monotonic(), os.getloadavg()[0]
    gains: dict[str, list[float]] = {w: [] for w in WAYS}
    ceiling, start = [], []
    oracle = OnTileOptions(steps=300, max_marks=4096, prior_weight=0.0, look_alike=False)
    with tempfile.TemporaryDirectory() as tmp:
        cache = FeatureCache(Path(tmp), encoder_version=encoder.version)
        try:
            (pool, heldout), classes = _load(args.dataset, encoder=encoder, cache=cache)
        except FileNotFoundError as exc:
            print(json.dumps({"dataset": args.dataset, "skipped": str(exc)}), flush=True)
            return 0
        (count,) = picked_counts(len(pool), (args.share,), least=3)
        (head,) = _heads_in_picker_order(pool, [count], class_indices=classes,
                                         encoder=encoder, mc_samples=8,
                                         log=lambda m: print(m, file=sys.stderr))
        rows = np.sort(np.random.default_rng(0).choice(
            len(heldout), size=min(args.tiles, len(heldout)), replace=False)).tolist()
        k = max(classes) + 1
        for r in rows:
            feats, image, truth = heldout.features[r], heldout.images[r], heldout.masks[r]
            learners = {
                "look_alike_rule": TileLearner(head, feats, image=image),
                "fit_whole": TileLearner(head, feats, image=image,
                                         options=OnTileOptions(look_alike=False)),
            }
            for way, g in session_gains(truth, learners, clicks=args.clicks,
                                        n_classes=k).items():
                gains[way].append(g)
            start.append(tile_iou(truth, learners["look_alike_rule"].proposal(), n_classes=k))
            grid = np.full(truth.shape, 255, np.uint8)
            grid[::4, ::4] = truth[::4, ::4]  # every 16th pixel marked with the truth
            fitted = TileLearner(head, feats, image=image, options=oracle).fit(grid)
            # scored where nothing was marked (marked pixels take their mark)
            ceiling.append(tile_iou(np.where(grid == 255, truth, 255).astype(np.uint8),
                                    fitted, n_classes=k))
    worse = int(np.sum(np.asarray(gains["look_alike_rule"])
                       < np.asarray(gains["marks_only"]) - 1e-9))
    line = {
        "dataset": args.dataset, "share": args.share, "labelled_tiles": count,
        "tiles": len(rows), "clicks": args.clicks,
        "iou_gain": {w: round(float(np.mean(v)), 4) for w, v in gains.items()},
        "rule_worse_than_marks_tiles": worse,
        "iou_proposal": round(float(np.mean(start)), 3),
        "ceiling": {"mean": round(float(np.mean(ceiling)), 3),
                    "min": round(float(np.min(ceiling)), 3),
                    "max": round(float(np.max(ceiling)), 3)},
        "seconds": round(time.monotonic() - t0, 1),
        "run": {"threads": threads, "load_1min_start": round(load0, 2),
                "load_1min_end": round(os.getloadavg()[0], 2)},
    }
    print(json.dumps(line), flush=True)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
