"""Label efficiency of the active-learning picker: learning curves per strategy.

A simulation of the labelling loop with the truth standing in for the annotators. For
every strategy (random, entropy, margin, bald, coreset, mixed) and every seed:

1. round 0 labels a seeded random set of pool tiles (``--initial-share`` of the pool, at
   least ``model.min_labelled_tiles``; the same set for every strategy at a given seed);
2. the head is trained on the labelled tiles from their cached encoder features
   (``train_head(mode="features")``, the project's early stopping) and its mIoU is
   measured on a fixed held-out set that no strategy ever labels;
3. the head proposes on the unlabelled pool tiles with MC-dropout (``propose_tiles``),
   which gives the scalars ``labeler pick`` reads from the store: mean entropy, mean
   margin, mean BALD, class fractions (of the proposed mask; of the truth for labelled
   tiles), and the pooled encoder embedding. Least confidence is 0, as the store holds
   none for head proposals. ``select_batch`` then picks the next ``k`` tiles; their truth
   is revealed, and the loop goes back to step 2 for ``--rounds`` rounds.

Random and coreset need no proposals (coreset uses the encoder embedding only), so the
pool is proposed only for the other strategies. Round 0 is trained once per seed and
shared by every strategy (same labelled set, same training seed). Per seed the head is
also trained once on every pool tile: ``full_miou``. ``share_to_95pct`` is the share of
pool tiles at which a curve first reaches 95 % of the full-label mIoU, interpolated
linearly between rounds (null when the rounds run never reach it); it is given for the
curve of the mean over seeds (against the mean full mIoU) and per seed (against that
seed's full mIoU).

mIoU: pixels of every held-out tile pooled into one confusion matrix (tiles overlap, so
pixels in overlaps count once per tile), IoU per class, mean over the classes present in
truth or prediction (Long, Shelhamer & Darrell 2015; ``labeler.metrics.mean_iou``).

Datasets:

``demo``
    The committed invented scenario ``demo_fields/`` (six plots of Brackenlow Farm, 20
    tiles of 256 px with overlap 32 each). Two whole plots (fixed, chosen with
    ``--split-seed``) are the held-out set; the other four plots (80 tiles) are the pool.
``peanut``
    Peanut crop/weed field photos (Tran & Phan, "Dense Multi-Scale Convolutional Network
    for Plant Segmentation", IEEE Access 11, 82640-82651, 2023; CC BY-SA 4.0), read in
    place from ``../shared/datasets/peanut-weed`` beside the repository and never copied.
    A fixed seeded subset of the 400 photos keeps the run short: ``--peanut-heldout-images``
    photos are the held-out set and ``--peanut-pool-images`` others the pool, every photo
    cut into 256 px tiles without overlap (12 per 960 x 720 photo; the last row and column
    of tiles are moved back to end at the edge).

Prints ONE JSON line: ``datasets`` (per dataset ``dataset``, ``full_miou``,
``strategies`` and the round shares), the top-level ``dataset``, ``full_miou`` and
``strategies`` of the first dataset run, ``targets`` (the picker's targets and whether
this run met them) and ``seconds``. Unless ``--no-docs`` (or ``--quick`` without
``--docs``), also writes ``docs/label_efficiency_<dataset>.png``,
``docs/label_efficiency.md`` and ``docs/label_efficiency.json`` (atomically).

Speed: one torch thread by default (``--threads``): on a shared two-core machine two
threads were several times slower than one. Every curve point and ``full_miou`` train
for at most ``--epochs`` epochs (default 6, the project's early stopping inside that
budget) so that a retrain takes seconds; ``full_miou_reference`` trains once (first
seed) on every pool tile with the project's own defaults (at most 40 epochs), to show
what the shorter budget costs. Proposals use ``--mc-samples`` dropout passes (default:
the project's 8). Features are cached in a temporary folder unless ``--cache`` keeps
them.

Masks are decision support only: spraying and fungicide decisions follow local
regulations and licensed agronomic advice.
"""

from __future__ import annotations

import argparse
import dataclasses
import inspect
import io
import json
import math
import os
import sys
import tempfile
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

REPO = Path(__file__).resolve().parents[1]
if str(REPO) not in sys.path:
    sys.path.insert(0, str(REPO))

from benchmarks.datasets import peanut_truth  # noqa: E402
from labeler.metrics import class_fractions, confusion_matrix, mean_iou  # noqa: E402
from labeler.picker import CandidatePool, select_batch  # noqa: E402
from labeler.settings import STRATEGIES, ModelSettings  # noqa: E402

__all__ = [
    "TileSet",
    "NEEDS_PROPOSALS",
    "share_to_target",
    "savings_pct",
    "round_sizes",
    "run_curves",
    "load_demo",
    "load_peanut",
    "plot_curves",
    "markdown_table",
    "main",
]

DATASETS = REPO.parent / "shared" / "datasets"
PEANUT = DATASETS / "peanut-weed"
DEMO = REPO / "demo_fields"
DOCS = REPO / "docs"
TILE = 256
#: Strategies whose picks read the head's uncertainty (the pool is proposed for them).
NEEDS_PROPOSALS = frozenset({"entropy", "margin", "bald", "mixed"})
#: Okabe & Ito (2008) colours per strategy in the plots.
COLOURS = {
    "random": "#000000",
    "entropy": "#56B4E9",
    "margin": "#009E73",
    "bald": "#D55E00",
    "coreset": "#CC79A7",
    "mixed": "#0072B2",
}
#: The picker's targets (project goals; published segmentation work reaches 95 % of the
#: full-label mIoU with 7-24 % of the labels: Siddiqui et al., CVPR 2020).
TARGET_MAX_SHARE = 0.30
TARGET_MIN_SAVINGS_PCT = 25.0

ProgressFn = Callable[[int, int, str], None]


def log(msg: str) -> None:
    print(f"[{time.strftime('%H:%M:%S')}] {msg}", file=sys.stderr, flush=True)


# -- data -----------------------------------------------------------------------------------------
@dataclass
class TileSet:
    """Tiles with their truth and cached features, one entry per tile in each list.

    Attributes
    ----------
    keys : list of str
        Unique tile names (``<dataset>/<image>/<row>,<col>,<h>,<w>``).
    features : list of tuple of 4 ndarray
        Encoder features per tile, shapes ``(C_i, ceil(H / s_i), ceil(W / s_i))`` for the
        strides 4, 8, 16, 32 (float16 from the cache).
    masks : list of ndarray, each (H, W) uint8
        Truth: class indices of the schema.
    images : list of ndarray, each (H, W, 3) uint8
        The tiles' pixels.
    """

    keys: list[str]
    features: list[tuple[np.ndarray, ...]]
    masks: list[np.ndarray]
    images: list[np.ndarray]
    shapes: list[tuple[int, int]] = field(init=False)

    def __post_init__(self) -> None:
        n = len(self.keys)
        for name in ("features", "masks", "images"):
            if len(getattr(self, name)) != n:
                raise ValueError(
                    f"{name}: expected one entry per key ({n}), got {len(getattr(self, name))}"
                )
        if len(set(self.keys)) != n:
            raise ValueError("keys: expected unique tile keys, got duplicates")
        self.shapes = [tuple(int(v) for v in np.shape(m)[:2]) for m in self.masks]

    def __len__(self) -> int:
        return len(self.keys)

    def subset(self, rows: Sequence[int]) -> TileSet:
        rows = [int(r) for r in rows]
        return TileSet(
            [self.keys[r] for r in rows],
            [self.features[r] for r in rows],
            [self.masks[r] for r in rows],
            [self.images[r] for r in rows],
        )


# -- curve arithmetic -----------------------------------------------------------------------------
def share_to_target(shares: Sequence[float], mious: Sequence[float], target: float) -> float | None:
    """Share of labelled tiles at which a learning curve first reaches ``target``.

    The curve is the polyline through ``(shares[r], mious[r])``; between the last round
    below the target and the first round at or above it the share is interpolated
    linearly. A curve that starts at or above the target gives ``shares[0]``.

    Parameters
    ----------
    shares : sequence of float, shape (R,)
        Labelled share of the pool per round, increasing.
    mious : sequence of float, shape (R,)
        mIoU per round; NaN rounds never count as reaching the target.
    target : float
        The mIoU to reach (95 % of the full-label mIoU).

    Returns
    -------
    share : float or None
        None when no round reaches the target (or the target is NaN).
    """
    s = np.asarray(shares, np.float64)
    m = np.asarray(mious, np.float64)
    if s.shape != m.shape or s.ndim != 1:
        raise ValueError(
            f"mious: expected one value per share (shape {s.shape}), got shape {m.shape}"
        )
    if s.size and np.any(np.diff(s) <= 0):
        raise ValueError(f"shares: expected strictly increasing shares, got {s.tolist()}")
    if not math.isfinite(target):
        return None
    for r in range(s.size):
        if not (math.isfinite(m[r]) and m[r] >= target):
            continue
        if r == 0 or not math.isfinite(m[r - 1]):
            return float(s[r])
        t = (target - m[r - 1]) / (m[r] - m[r - 1])  # m[r - 1] < target <= m[r]
        return float(s[r - 1] + t * (s[r] - s[r - 1]))
    return None


def savings_pct(share: float | None, share_random: float | None) -> float | None:
    """Tiles saved against random, in % of random's share; None unless both are known."""
    if share is None or share_random is None or share_random <= 0:
        return None
    return 100.0 * (share_random - share) / share_random


def round_sizes(n_pool: int, *, n_initial: int, k: int, rounds: int) -> list[int]:
    """Labelled tiles after each round: ``n_initial``, then ``k`` more per round.

    The list stops early when the pool is exhausted (the last round takes the rest).
    """
    if not 1 <= n_initial <= n_pool:
        raise ValueError(f"n_initial: expected 1..{n_pool} tiles (the pool size), got {n_initial}")
    if k < 1:
        raise ValueError(f"k: expected at least 1 tile per round, got {k}")
    if rounds < 0:
        raise ValueError(f"rounds: expected 0 or more, got {rounds}")
    sizes = [n_initial]
    for _ in range(rounds):
        if sizes[-1] >= n_pool:
            break
        sizes.append(min(n_pool, sizes[-1] + k))
    return sizes


# -- model calls (whatever the model room currently offers) ---------------------------------------
def _accepts(fn: Callable, name: str) -> bool:
    return name in inspect.signature(fn).parameters


def _train(tiles: TileSet, rows: Sequence[int], *, class_indices, settings, encoder):
    from labeler.model.train import train_head

    kwargs: dict[str, object] = {}
    if _accepts(train_head, "images"):
        kwargs["images"] = [tiles.images[r] for r in rows]
    if encoder is not None and _accepts(train_head, "encoder"):
        kwargs["encoder"] = encoder
    if _accepts(train_head, "mode"):
        kwargs["mode"] = "features"
    return train_head(
        [tiles.masks[r] for r in rows],
        class_indices=class_indices,
        features=[tiles.features[r] for r in rows],
        settings=settings,
        **kwargs,
    )


def _propose(head, tiles: TileSet, rows: Sequence[int], *, mc_samples: int, seed: int):
    from labeler.model.predict import propose_tiles

    kwargs: dict[str, object] = {}
    if _accepts(propose_tiles, "images"):
        kwargs["images"] = [tiles.images[r] for r in rows]
    return propose_tiles(
        head,
        [tiles.features[r] for r in rows],
        tile_shapes=[tiles.shapes[r] for r in rows],
        mc_samples=mc_samples,
        seed=seed,
        **kwargs,
    )


def _evaluate(head, heldout: TileSet, *, n_classes: int, mc_samples: int, seed: int) -> float:
    cm = np.zeros((n_classes, n_classes), np.int64)
    for start in range(0, len(heldout), 32):
        rows = list(range(start, min(start + 32, len(heldout))))
        for r, prop in zip(
            rows, _propose(head, heldout, rows, mc_samples=mc_samples, seed=seed), strict=True
        ):
            cm += confusion_matrix(heldout.masks[r], prop.mask, n_classes=n_classes)
    return mean_iou(cm)


@dataclass
class _PoolScores:
    """Uncertainty scalars of the unlabelled pool tiles under one head (NaN elsewhere)."""

    entropy: np.ndarray
    margin: np.ndarray
    bald: np.ndarray
    fractions: np.ndarray


def _pool_scores(head, pool: TileSet, labelled: np.ndarray, *, k_classes, mc_samples, seed):
    n = len(pool)
    out = _PoolScores(np.zeros(n), np.ones(n), np.zeros(n), np.zeros((n, k_classes), np.float64))
    rows = np.flatnonzero(~labelled).tolist()
    for start in range(0, len(rows), 32):
        part = rows[start : start + 32]
        for r, p in zip(
            part, _propose(head, pool, part, mc_samples=mc_samples, seed=seed), strict=True
        ):
            out.entropy[r] = p.mean_entropy
            out.margin[r] = min(max(p.mean_margin, 0.0), 1.0)
            out.bald[r] = max(p.mean_bald, 0.0)
            out.fractions[r] = p.class_fractions
    return out


def _pick(
    strategy: str,
    *,
    labelled: np.ndarray,
    k: int,
    seed: int,
    embeddings: np.ndarray,
    truth_fractions: np.ndarray,
    scores: _PoolScores | None,
) -> np.ndarray:
    """Pool rows of the next batch, the way ``labeler pick`` builds its pool."""
    n = labelled.size
    if scores is None:  # random and coreset read no uncertainty
        scores = _PoolScores(np.zeros(n), np.ones(n), np.zeros(n), np.zeros(truth_fractions.shape))
    fractions = np.where(labelled[:, None], truth_fractions, scores.fractions)
    pool = CandidatePool(
        ids=np.arange(n),
        embeddings=embeddings,
        entropy=np.where(labelled, 0.0, scores.entropy),
        margin=np.where(labelled, 1.0, scores.margin),
        least_confidence=np.zeros(n),
        bald=np.where(labelled, 0.0, scores.bald),
        class_fractions=fractions,
        annotators=labelled.astype(np.int64),
    )
    sel = select_batch(pool, strategy=strategy, k=k, seed=seed)
    return np.asarray(sel.positions[: sel.n_chosen], np.int64)


# -- the simulation -------------------------------------------------------------------------------
def run_curves(
    pool: TileSet,
    heldout: TileSet,
    *,
    class_indices: Sequence[int],
    strategies: Sequence[str] = STRATEGIES,
    seeds: Sequence[int] = (0, 1, 2),
    rounds: int,
    k: int,
    n_initial: int,
    settings: ModelSettings | None = None,
    mc_samples: int = 8,
    encoder: object | None = None,
    reference_settings: ModelSettings | None = None,
    progress: ProgressFn | None = None,
) -> dict:
    """Learning curves of every strategy: pick k, reveal truth, retrain, measure, repeat.

    Parameters
    ----------
    pool : TileSet
        N tiles the strategies pick from (their truth is revealed when picked).
    heldout : TileSet
        Fixed evaluation tiles, never picked.
    class_indices : sequence of int
        Schema indices the head predicts, e.g. ``(0, 1, 2, 3)``.
    strategies : sequence of str
        Picker strategies (:data:`labeler.settings.STRATEGIES`).
    seeds : sequence of int
        One curve per strategy and seed; the seed draws the initial set, seeds the random
        picks (``seed * 1000 + round``) and is the training seed (``ModelSettings.seed``).
    rounds : int
        Picking rounds after round 0 (fewer when the pool runs out).
    k : int
        Tiles picked per round.
    n_initial : int
        Size of the round-0 random set (at least ``settings.min_labelled_tiles``).
    settings : ModelSettings, optional
        Training options; ``seed`` is replaced by each seed.
    mc_samples : int
        Dropout passes of the proposals (pool uncertainty and held-out masks).
    encoder : optional
        Passed to ``train_head`` (if it takes one) in case a model needs the encoder.
    reference_settings : ModelSettings, optional
        When given, the first seed also trains on every pool tile with these settings
        (normally the project's defaults, e.g. 40 epochs), reported as
        ``full_miou_reference``: what a shorter training budget costs at full labels.
    progress : callable, optional
        ``progress(done, total, what)`` after each retrain.

    Returns
    -------
    result : dict
        ``labelled_tiles_by_round`` (R + 1 ints), ``labelled_share_by_round``,
        ``full_miou`` (mean over seeds), ``full_miou_per_seed``, ``target_95pct``,
        ``retrains`` and ``strategies``: per strategy ``miou_by_round`` (mean over seeds),
        ``miou_by_round_per_seed`` (one list per seed), ``miou_by_round_min`` /
        ``_max``, ``labelled_share_by_round``, ``share_to_95pct`` (mean curve),
        ``share_to_95pct_per_seed`` and ``savings_vs_random_pct`` (when random ran).
    """
    s0 = settings or ModelSettings()
    unknown = [s for s in strategies if s not in STRATEGIES]
    if unknown or not strategies:
        raise ValueError(
            f"strategies: expected a non-empty selection of {', '.join(STRATEGIES)}, "
            f"got {list(strategies)}"
        )
    if not seeds:
        raise ValueError("seeds: expected at least one seed, got none")
    if n_initial < s0.min_labelled_tiles:
        raise ValueError(
            f"n_initial: expected at least model.min_labelled_tiles = {s0.min_labelled_tiles} "
            f"tiles (training needs them), got {n_initial}; raise the initial share"
        )
    if len(heldout) == 0:
        raise ValueError("heldout: expected at least one evaluation tile, got none")
    idx = tuple(int(i) for i in class_indices)
    n_classes = max(idx) + 1
    n = len(pool)
    sizes = round_sizes(n, n_initial=n_initial, k=k, rounds=rounds)
    shares = [sz / n for sz in sizes]
    embeddings = np.stack(
        [np.asarray(f[3], np.float32).mean(axis=(1, 2)) for f in pool.features]
    )  # global average of the stride-32 features, as in propose_tiles
    truth_fractions = np.stack([class_fractions(m, idx) for m in pool.masks])

    total = len(seeds) * (2 + len(strategies) * (len(sizes) - 1))
    total += reference_settings is not None
    done = 0

    def step(what: str) -> None:
        nonlocal done
        done += 1
        if progress is not None:
            progress(done, total, what)

    curves = {s: [] for s in strategies}
    full = []
    reference = None
    if reference_settings is not None:
        ms = dataclasses.replace(reference_settings, seed=int(seeds[0]))
        res = _train(pool, range(n), class_indices=idx, settings=ms, encoder=encoder)
        reference = {
            "miou": round(
                _evaluate(
                    res.head, heldout, n_classes=n_classes, mc_samples=mc_samples, seed=seeds[0]
                ),
                4,
            ),
            "seed": int(seeds[0]),
            "epochs_max": ms.epochs,
            "epochs_run": len(res.history),
            "best_epoch": res.best_epoch,
        }
        step(f"seed {seeds[0]}: full labels, reference training")
    for seed in seeds:
        ms = dataclasses.replace(s0, seed=int(seed))
        res = _train(pool, range(n), class_indices=idx, settings=ms, encoder=encoder)
        full.append(
            _evaluate(res.head, heldout, n_classes=n_classes, mc_samples=mc_samples, seed=seed)
        )
        step(f"seed {seed}: full labels")
        initial = np.zeros(n, bool)
        initial[np.random.default_rng(seed).choice(n, size=n_initial, replace=False)] = True
        res0 = _train(
            pool, np.flatnonzero(initial), class_indices=idx, settings=ms, encoder=encoder
        )
        miou0 = _evaluate(res0.head, heldout, n_classes=n_classes, mc_samples=mc_samples, seed=seed)
        step(f"seed {seed}: round 0")
        scores0 = None
        if len(sizes) > 1 and NEEDS_PROPOSALS.intersection(strategies):
            scores0 = _pool_scores(
                res0.head, pool, initial, k_classes=len(idx), mc_samples=mc_samples, seed=seed
            )
        for strategy in strategies:
            labelled = initial.copy()
            curve = [miou0]
            scores = scores0
            for r in range(1, len(sizes)):
                picked = _pick(
                    strategy,
                    labelled=labelled,
                    k=sizes[r] - sizes[r - 1],
                    seed=int(seed) * 1000 + r,
                    embeddings=embeddings,
                    truth_fractions=truth_fractions,
                    scores=scores if strategy in NEEDS_PROPOSALS else None,
                )
                labelled[picked] = True
                res = _train(
                    pool, np.flatnonzero(labelled), class_indices=idx, settings=ms, encoder=encoder
                )
                curve.append(
                    _evaluate(
                        res.head, heldout, n_classes=n_classes, mc_samples=mc_samples, seed=seed
                    )
                )
                if strategy in NEEDS_PROPOSALS and r + 1 < len(sizes):
                    scores = _pool_scores(
                        res.head,
                        pool,
                        labelled,
                        k_classes=len(idx),
                        mc_samples=mc_samples,
                        seed=seed,
                    )
                step(f"seed {seed}: {strategy} round {r} ({int(labelled.sum())} tiles)")
            curves[strategy].append(curve)

    full_arr = np.asarray(full, np.float64)
    full_mean = float(full_arr.mean())
    out_strategies: dict[str, dict] = {}
    for strategy in strategies:
        per_seed = np.asarray(curves[strategy], np.float64)  # (n_seeds, R + 1)
        mean_curve = per_seed.mean(axis=0)
        out_strategies[strategy] = {
            "miou_by_round": _r(mean_curve),
            "miou_by_round_per_seed": [_r(c) for c in per_seed],
            "miou_by_round_min": _r(per_seed.min(axis=0)),
            "miou_by_round_max": _r(per_seed.max(axis=0)),
            "labelled_share_by_round": _r(shares),
            "share_to_95pct": _r1(share_to_target(shares, mean_curve, 0.95 * full_mean)),
            "share_to_95pct_per_seed": [
                _r1(share_to_target(shares, c, 0.95 * f))
                for c, f in zip(per_seed, full_arr, strict=True)
            ],
        }
    if "random" in out_strategies:
        base = out_strategies["random"]
        for entry in out_strategies.values():
            entry["savings_vs_random_pct"] = _r1(
                savings_pct(entry["share_to_95pct"], base["share_to_95pct"]), 1
            )
            entry["savings_vs_random_pct_per_seed"] = [
                _r1(savings_pct(a, b), 1)
                for a, b in zip(
                    entry["share_to_95pct_per_seed"], base["share_to_95pct_per_seed"], strict=True
                )
            ]
            if base["share_to_95pct"] is None and entry["share_to_95pct"] is not None:
                # random never got there within the rounds run: a lower bound only
                entry["savings_vs_random_pct_at_least"] = _r1(
                    savings_pct(entry["share_to_95pct"], shares[-1]), 1
                )
    return {
        "labelled_tiles_by_round": sizes,
        "labelled_share_by_round": _r(shares),
        "full_miou": round(full_mean, 4),
        "full_miou_per_seed": _r(full_arr),
        "target_95pct": round(0.95 * full_mean, 4),
        "full_miou_reference": reference,
        "retrains": total,
        "strategies": out_strategies,
    }


def _r(values) -> list[float | None]:
    return [None if not math.isfinite(float(v)) else round(float(v), 4) for v in values]


def _r1(value: float | None, digits: int = 4) -> float | None:
    return None if value is None or not math.isfinite(value) else round(float(value), digits)


# -- datasets -------------------------------------------------------------------------------------
def _tiles_of(
    dataset: str, ident: str, image: np.ndarray, truth: np.ndarray, *, overlap: int
) -> tuple[list[str], list[np.ndarray], list[np.ndarray]]:
    from labeler.imagery.tiling import tile_grid

    if truth.shape != image.shape[:2]:
        raise ValueError(
            f"{dataset}/{ident}: truth shape {truth.shape} differs from the image's "
            f"{image.shape[:2]}; pass the label of the same image"
        )
    windows = tile_grid(*image.shape[:2], size=TILE, overlap=overlap)
    keys = [f"{dataset}/{ident}/{w.row},{w.col},{w.height},{w.width}" for w in windows]
    return (
        keys,
        [np.array(image[w.slices]) for w in windows],
        [np.array(truth[w.slices]) for w in windows],
    )


def _encode(keys, images, *, encoder, cache) -> list[tuple[np.ndarray, ...]]:
    by_key = dict(zip(keys, images, strict=True))
    return cache.get_or_compute(
        keys,
        lambda ks: [by_key[k_] for k_ in ks],
        encoder,
        tile_shapes=[tuple(im.shape[:2]) for im in images],
        batch_size=4,
    )


def _tile_set(items, *, encoder, cache) -> TileSet:
    keys, ims, masks = [], [], []
    for k_, im, m in items:
        keys += k_
        ims += im
        masks += m
    return TileSet(keys, _encode(keys, ims, encoder=encoder, cache=cache), masks, ims)


def load_demo(
    *, encoder, cache, heldout_plots: int = 2, split_seed: int = 0, folder: Path = DEMO
) -> tuple[TileSet, TileSet, dict]:
    """Pool and held-out tiles of the committed demo plots (whole plots held out)."""
    from labeler.imagery.read import read_image
    from labeler.imagery.write import png_decode

    plots = sorted(p for p in folder.glob("*.tif") if not p.name.startswith("."))
    if len(plots) <= heldout_plots:
        raise FileNotFoundError(
            f"{folder.name}/: expected more than {heldout_plots} demo plots, got {len(plots)}; "
            "run '.venv/bin/python -m labeler.demo.fields demo_fields'"
        )
    order = np.random.default_rng(split_seed).permutation(len(plots))
    held = {plots[i].stem for i in order[:heldout_plots]}
    pool_items, held_items = [], []
    for p in plots:
        truth = png_decode(p.with_name(f"{p.stem}_truth.png").read_bytes())
        item = _tiles_of("demo", p.stem, read_image(p), truth, overlap=32)
        (held_items if p.stem in held else pool_items).append(item)
    pool = _tile_set(pool_items, encoder=encoder, cache=cache)
    heldout = _tile_set(held_items, encoder=encoder, cache=cache)
    info = {
        "name": "demo",
        "source": "demo_fields/ (invented Brackenlow Farm scenario, made by labeler.demo)",
        "classes": ["soil", "crop", "weed", "symptom"],
        "pool_plots": sorted({k_.split("/")[1] for k_ in pool.keys}),
        "heldout_plots": sorted(held),
        "pool_tiles": len(pool),
        "heldout_tiles": len(heldout),
        "tile": TILE,
        "overlap": 32,
    }
    return pool, heldout, info


def load_peanut(
    *,
    encoder,
    cache,
    pool_images: int = 16,
    heldout_images: int = 6,
    split_seed: int = 0,
    folder: Path = PEANUT,
) -> tuple[TileSet, TileSet, dict]:
    """Pool and held-out tiles of a fixed seeded subset of the peanut photos (read in place).

    Tran & Phan, IEEE Access 11, 2023; CC BY-SA 4.0 (see the dataset's SOURCE.md).
    """
    from labeler.imagery.read import read_image

    images = sorted((folder / "images").glob("*.jpg"))
    if not images:
        raise FileNotFoundError(
            f"peanut-weed dataset absent at ../shared/datasets/{folder.name} (no images/*.jpg)"
        )
    if pool_images + heldout_images > len(images):
        raise ValueError(
            f"--peanut-pool-images + --peanut-heldout-images: expected at most {len(images)} "
            f"photos, got {pool_images} + {heldout_images}"
        )
    order = np.random.default_rng(split_seed).permutation(len(images))
    held = [images[i] for i in sorted(order[:heldout_images])]
    pooled = [images[i] for i in sorted(order[heldout_images : heldout_images + pool_images])]

    def items(paths):
        out = []
        for p in paths:
            label = folder / "labels" / f"{p.stem}.png"
            truth = peanut_truth(read_image(label), label.name)
            out.append(_tiles_of("peanut", p.stem, read_image(p), truth, overlap=0))
        return out

    pool = _tile_set(items(pooled), encoder=encoder, cache=cache)
    heldout = _tile_set(items(held), encoder=encoder, cache=cache)
    info = {
        "name": "peanut",
        "source": (
            "../shared/datasets/peanut-weed, read in place: Tran & Phan, 'Dense Multi-Scale "
            "Convolutional Network for Plant Segmentation', IEEE Access 11, 82640-82651, "
            "2023; CC BY-SA 4.0"
        ),
        "classes": ["soil", "crop", "weed"],
        "subset": (
            f"{pool_images} pool + {heldout_images} held-out photos of 400, "
            f"numpy default_rng({split_seed}).permutation"
        ),
        "pool_images": [p.stem for p in pooled],
        "heldout_images": [p.stem for p in held],
        "pool_tiles": len(pool),
        "heldout_tiles": len(heldout),
        "tile": TILE,
        "overlap": 0,
    }
    return pool, heldout, info


# -- reports --------------------------------------------------------------------------------------
def plot_curves(result: dict, *, title: str) -> bytes:
    """PNG bytes of mIoU against labelled share, one line per strategy, seed band, 95 % line."""
    import matplotlib

    matplotlib.use("Agg")
    from matplotlib import pyplot as plt

    fig, ax = plt.subplots(figsize=(7.0, 4.6), dpi=110)
    for name, entry in result["strategies"].items():
        x = 100.0 * np.asarray(entry["labelled_share_by_round"], float)
        y = np.asarray(entry["miou_by_round"], float)
        lo = np.asarray(entry["miou_by_round_min"], float)
        hi = np.asarray(entry["miou_by_round_max"], float)
        colour = COLOURS.get(name, "#999999")
        ax.fill_between(x, lo, hi, color=colour, alpha=0.15, linewidth=0)
        ax.plot(
            x,
            y,
            color=colour,
            marker="o",
            markersize=3,
            linewidth=2.4 if name == "mixed" else 1.4,
            label=name,
        )
    full = result["full_miou"]
    ax.axhline(
        0.95 * full,
        color="#555555",
        linestyle="--",
        linewidth=1.0,
        label=f"95 % of full labels ({0.95 * full:.3f})",
    )
    ax.axhline(
        full, color="#555555", linestyle=":", linewidth=1.0, label=f"full labels ({full:.3f})"
    )
    ax.set_xlabel("labelled share of the pool tiles (%)")
    ax.set_ylabel("held-out mIoU")
    ax.set_title(title, fontsize=10)
    ax.grid(alpha=0.3)
    ax.legend(fontsize=8, loc="lower right")
    fig.tight_layout()
    buf = io.BytesIO()
    fig.savefig(buf, format="png")
    plt.close(fig)
    return buf.getvalue()


def _pct(share: float | None) -> str:
    return "not reached" if share is None else f"{100.0 * share:.1f} %"


def _reference_text(ref: dict | None) -> str:
    if not ref:
        return ""
    return (
        f"; with the project's own training budget (at most {ref['epochs_max']} epochs, "
        f"early stopping after {ref['epochs_run']}, seed {ref['seed']}) full labels give "
        f"{ref['miou']:.3f}"
    )


def markdown_table(report: dict) -> str:
    """The markdown page of ``docs/label_efficiency.md`` for one run's JSON report."""
    lines = [
        "# Label efficiency of the picker",
        "",
        "Made by `benchmarks/label_efficiency.py` (do not edit by hand; run it again). The "
        "truth of each dataset plays the annotators: each round the picker chooses `k` pool "
        "tiles, their truth is revealed, the head is retrained from cached features and "
        "measured on a fixed held-out set. 'Share to 95 %' is the share of the pool tiles at "
        "which the curve of the mean over seeds first reaches 95 % of the mIoU of a head "
        "trained on every pool tile (linear interpolation between rounds); the per-seed "
        "column measures each seed's curve against that seed's own full-label mIoU. Savings "
        "are against `random`, in % of its share. The last column measures the mean curve "
        "against 95 % of the reference head (every pool tile, the project's own training "
        "budget, first seed): it shows how much the short training budget of the curves "
        "flatters them.",
        "",
        f"Targets: `mixed` reaches 95 % with at most {100 * TARGET_MAX_SHARE:.0f} % of the "
        f"tiles and at least {TARGET_MIN_SAVINGS_PCT:.0f} % fewer tiles than `random` "
        "(published segmentation work: 95 % of full-label mIoU with 7-24 % of the labels, "
        "Siddiqui et al., CVPR 2020).",
        "",
    ]
    ctx = report.get("context", {})
    for name, res in report["datasets"].items():
        info = res["dataset"]
        lines += [
            f"## {name}",
            "",
            f"Source: {info['source']}.",
            "",
            f"Pool {info['pool_tiles']} tiles, held-out {info['heldout_tiles']} tiles"
            + (f" ({info['subset']})" if "subset" in info else "")
            + f"; {len(res['full_miou_per_seed'])} seed(s); labelled tiles per round "
            f"{res['labelled_tiles_by_round']}. Full-label mIoU {res['full_miou']:.3f} "
            f"(per seed {res['full_miou_per_seed']})"
            + _reference_text(res.get("full_miou_reference"))
            + ".",
            "",
            "| strategy | share to 95 % | per seed | savings vs random | final mIoU "
            "| share to 95 % of the reference |",
            "|---|---|---|---|---|---|",
        ]
        ref = res.get("full_miou_reference")
        for strategy, e in res["strategies"].items():
            to_ref = "n/a"
            if ref:
                to_ref = _pct(
                    share_to_target(
                        e["labelled_share_by_round"],
                        [math.nan if v is None else v for v in e["miou_by_round"]],
                        0.95 * ref["miou"],
                    )
                )
            sav = e.get("savings_vs_random_pct")
            if sav is not None:
                sav_text = f"{sav:.1f} %"
            elif e.get("savings_vs_random_pct_at_least") is not None:
                sav_text = f"at least {e['savings_vs_random_pct_at_least']:.1f} %"
            else:
                sav_text = "n/a"
            per = ", ".join(_pct(s) for s in e["share_to_95pct_per_seed"])
            lines.append(
                f"| {strategy} | {_pct(e['share_to_95pct'])} | {per} | {sav_text} | "
                f"{e['miou_by_round'][-1]:.3f} | {to_ref} |"
            )
        lines += ["", f"![learning curves, {name}](label_efficiency_{name}.png)", ""]
    t = report.get("targets", {})
    if t:
        lines += ["## Targets in this run", ""]
        for name, v in t.items():
            sav = v["mixed_savings_pct"]
            if sav is not None:
                sav_text = f"{sav:.1f} %"
            elif v["mixed_savings_pct_at_least"] is not None:
                sav_text = f"at least {v['mixed_savings_pct_at_least']:.1f} %"
            else:
                sav_text = "n/a"
            lines.append(
                f"- {name}: `mixed` share {_pct(v['mixed_share_to_95pct'])} "
                f"(target at most {100 * TARGET_MAX_SHARE:.0f} %: "
                f"{'met' if v['share_met'] else 'not met'}); savings vs random {sav_text} "
                f"(target at least {TARGET_MIN_SAVINGS_PCT:.0f} %: "
                f"{'met' if v['savings_met'] else 'not met'})"
            )
        lines.append("")
    lines += [
        "## Run",
        "",
        f'Training: `train_head(mode="features")`, at most {ctx.get("epochs")} epochs with '
        f"the project's early stopping (patience {ctx.get('patience')}, validation share "
        f"{ctx.get('val_share')}); proposals with {ctx.get('mc_samples')} MC-dropout passes; "
        f"{ctx.get('threads')} torch thread(s). With a budget this short the early "
        "stopping seldom fires; the epoch of lowest validation loss is kept. "
        f"{ctx.get('seconds')} s in all, on a shared "
        f"machine (1-minute load average {ctx.get('load_avg_start')} at the start, "
        f"{ctx.get('load_avg_end')} at the end), so the seconds are not a speed figure.",
        "",
        "Masks are decision support only. Where they drive spot spraying or fungicide timing, "
        "local regulations and licensed agronomic advice come first.",
        "",
    ]
    return "\n".join(lines)


def _targets(results: dict) -> dict:
    out = {}
    for name, res in results.items():
        st = res["strategies"]
        if "mixed" not in st:
            continue
        share = st["mixed"]["share_to_95pct"]
        sav = st["mixed"].get("savings_vs_random_pct")
        at_least = st["mixed"].get("savings_vs_random_pct_at_least")
        out[name] = {
            "mixed_share_to_95pct": share,
            "share_met": share is not None and share <= TARGET_MAX_SHARE,
            "mixed_savings_pct": sav,
            "mixed_savings_pct_at_least": at_least,
            "savings_met": (sav is not None and sav >= TARGET_MIN_SAVINGS_PCT)
            or (at_least is not None and at_least >= TARGET_MIN_SAVINGS_PCT),
        }
    return out


# -- command line ---------------------------------------------------------------------------------
def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--datasets", default="demo,peanut", help="comma-separated: demo, peanut")
    ap.add_argument("--seeds", type=int, default=3, help="seeds 0..N-1 (default 3)")
    ap.add_argument("--rounds", type=int, help="picking rounds after round 0 (default per dataset)")
    ap.add_argument("--k", type=int, help="tiles per round (default per dataset)")
    ap.add_argument("--strategies", default=",".join(STRATEGIES))
    ap.add_argument(
        "--initial-share",
        type=float,
        default=0.03,
        help="round-0 random share of the pool (at least min_labelled_tiles tiles)",
    )
    ap.add_argument(
        "--quick",
        action="store_true",
        help="smoke run: 1 seed, random and mixed, 2 rounds, small peanut subset",
    )
    ap.add_argument("--cache", type=Path, help="keep features here (default: a temporary folder)")
    ap.add_argument("--threads", type=int, default=1, help="torch threads (default 1)")
    ap.add_argument("--epochs", type=int, default=6, help="upper bound of training epochs")
    ap.add_argument(
        "--mc-samples",
        type=int,
        default=ModelSettings().mc_samples,
        help="MC-dropout passes (default: the project's model.mc_samples)",
    )
    ap.add_argument("--split-seed", type=int, default=0, help="seed of the held-out choice")
    ap.add_argument("--peanut-pool-images", type=int, default=16)
    ap.add_argument("--peanut-heldout-images", type=int, default=6)
    ap.add_argument("--docs", type=Path, help="folder of the plots, table and JSON (default docs/)")
    ap.add_argument("--no-docs", action="store_true", help="print the JSON line only")
    args = ap.parse_args(argv)

    strategies = [s.strip() for s in args.strategies.split(",") if s.strip()]
    seeds = list(range(args.seeds))
    rounds_default = {"demo": 5, "peanut": 5}
    k_default = {"demo": 8, "peanut": 16}
    if args.quick:
        strategies = [s for s in ("random", "mixed") if s in strategies] or strategies[:2]
        seeds = seeds[:1]
        rounds_default = {"demo": 2, "peanut": 2}
        if args.peanut_pool_images == 16:
            args.peanut_pool_images = 6
        if args.peanut_heldout_images == 6:
            args.peanut_heldout_images = 2
    datasets = [d.strip() for d in args.datasets.split(",") if d.strip()]
    bad = [d for d in datasets if d not in ("demo", "peanut")]
    if bad or not datasets:
        ap.error(f"--datasets: expected demo and/or peanut, got {args.datasets!r}")
    write_docs = not args.no_docs and (args.docs is not None or not args.quick)
    docs = args.docs if args.docs is not None else DOCS

    from tqdm import tqdm

    from labeler.model.cache import FeatureCache
    from labeler.model.encoder import load_encoder
    from labeler.model.runtime import configure_threads

    threads = configure_threads(args.threads)
    settings = ModelSettings(epochs=args.epochs)
    load_start = round(os.getloadavg()[0], 2)
    t_start = time.perf_counter()
    encoder = load_encoder()
    results: dict[str, dict] = {}
    reasons: dict[str, str] = {}
    with tempfile.TemporaryDirectory(prefix="labeler-efficiency-") as tmp:
        folder = args.cache if args.cache is not None else Path(tmp)
        cache = FeatureCache(folder, encoder_version=encoder.version)
        for name in datasets:
            t0 = time.perf_counter()
            try:
                if name == "demo":
                    pool, heldout, info = load_demo(
                        encoder=encoder, cache=cache, split_seed=args.split_seed
                    )
                    classes = (0, 1, 2, 3)
                else:
                    pool, heldout, info = load_peanut(
                        encoder=encoder,
                        cache=cache,
                        pool_images=args.peanut_pool_images,
                        heldout_images=args.peanut_heldout_images,
                        split_seed=args.split_seed,
                    )
                    classes = (0, 1, 2)
            except FileNotFoundError as exc:
                reasons[name] = str(exc)
                log(f"{name}: skipped ({exc})")
                continue
            log(
                f"{name}: {len(pool)} pool / {len(heldout)} held-out tiles encoded in "
                f"{time.perf_counter() - t0:.0f} s"
            )
            n_initial = max(settings.min_labelled_tiles, round(args.initial_share * len(pool)))
            k = args.k or k_default[name]
            rounds = args.rounds if args.rounds is not None else rounds_default[name]
            bar = tqdm(total=1, desc=name, unit="retrain", file=sys.stderr)

            def progress(done: int, total: int, what: str, bar=bar) -> None:
                bar.total = total
                bar.set_postfix_str(what, refresh=False)
                bar.update(done - bar.n)

            reference = None if args.quick else ModelSettings()
            res = run_curves(
                pool,
                heldout,
                class_indices=classes,
                strategies=strategies,
                seeds=seeds,
                rounds=rounds,
                k=k,
                n_initial=n_initial,
                settings=settings,
                mc_samples=args.mc_samples,
                encoder=encoder,
                reference_settings=reference,
                progress=progress,
            )
            bar.close()
            res["dataset"] = info
            res["k"] = k
            res["rounds"] = len(res["labelled_tiles_by_round"]) - 1
            res["seconds"] = round(time.perf_counter() - t0, 1)
            results[name] = res
            log(
                f"{name}: done in {res['seconds']:.0f} s; full mIoU {res['full_miou']}; "
                + ", ".join(f"{s} {e['share_to_95pct']}" for s, e in res["strategies"].items())
            )
            del pool, heldout
    first = next(iter(results.values()), None)
    report: dict[str, object] = {
        "dataset": None if first is None else first["dataset"]["name"],
        "full_miou": None if first is None else first["full_miou"],
        "strategies": None if first is None else first["strategies"],
        "datasets": results,
        "targets": _targets(results),
        "reasons": reasons,
        "context": {
            "seeds": seeds,
            "epochs": args.epochs,
            "val_share": settings.val_share,
            "patience": ModelSettings().patience,
            "mc_samples": args.mc_samples,
            "initial_share": args.initial_share,
            "threads": threads,
            "quick": args.quick,
            "load_avg_start": load_start,
            "load_avg_end": round(os.getloadavg()[0], 2),
            "machine": "shared CPU machine, other jobs running",
        },
        "seconds": round(time.perf_counter() - t_start, 1),
    }
    report["context"]["seconds"] = report["seconds"]  # type: ignore[index]
    line = json.dumps(report)
    if write_docs and results:
        from labeler.imagery.write import atomic_write_bytes

        for name, res in results.items():
            title = f"{name}: learning curves ({len(seeds)} seed(s), band = min..max over seeds)"
            atomic_write_bytes(docs / f"label_efficiency_{name}.png", plot_curves(res, title=title))
        atomic_write_bytes(docs / "label_efficiency.md", markdown_table(report).encode())
        atomic_write_bytes(docs / "label_efficiency.json", (line + "\n").encode())
    print(line)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
