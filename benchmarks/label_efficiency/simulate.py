"""The labelling loop simulated with the truth standing in for the annotators.

For every strategy and every seed (:func:`run_curves`):

1. round 0 labels a seeded random set of ``n_initial`` pool tiles (the same set for every
   strategy at a given seed);
2. the head is trained on the labelled tiles from their cached encoder features
   (``train_head(mode="features")``, the project's early stopping) and its mIoU is
   measured on a fixed held-out set that no strategy ever labels;
3. the head proposes on the unlabelled pool tiles with MC-dropout (``propose_tiles``),
   which gives the scalars ``labeler pick`` reads from the store: mean entropy, mean
   margin, mean least confidence, mean BALD, class fractions (of the proposed mask; of
   the truth for labelled tiles), and the pooled encoder embedding. ``pick_batch`` then
   picks the next ``k`` tiles; their truth is revealed, and the loop goes back to step 2.

Random and coreset need no proposals (coreset uses the encoder embedding only), so the
pool is proposed only for the other strategies. Round 0 is trained once per seed and
shared by every strategy (same labelled set, same training seed). Per seed the head is
also trained once on every pool tile: the full-label mIoU.

mIoU: pixels of every held-out tile pooled into one confusion matrix (tiles overlap, so
pixels in overlaps count once per tile), IoU per class, mean over the classes present in
truth or prediction (Long, Shelhamer & Darrell 2015; ``labeler.agreement.mean_iou``).
"""

from __future__ import annotations

import dataclasses
from collections.abc import Callable, Sequence
from dataclasses import dataclass

import numpy as np

from benchmarks.label_efficiency.curves import round_sizes, rounded, summarise_curves
from benchmarks.label_efficiency.tiles import TileSet
from labeler.metrics import class_fractions, confusion_matrix, mean_iou
from labeler.picker import CandidatePool, pick_batch
from labeler.settings import STRATEGIES, ModelSettings

__all__ = ["NEEDS_PROPOSALS", "PoolScores", "run_curves"]

#: Strategies whose picks read the head's uncertainty (the pool is proposed for them).
NEEDS_PROPOSALS = frozenset({"entropy", "margin", "bald", "mixed"})
#: Tiles per call of ``propose_tiles`` (held-out evaluation and pool scores).
PROPOSE_CHUNK = 32

ProgressFn = Callable[[int, int, str], None]


# -- model calls ----------------------------------------------------------------------------------
def _train(tiles: TileSet, rows: Sequence[int], *, class_indices, settings, encoder):
    from labeler.model.train import train_head

    return train_head(
        [tiles.masks[r] for r in rows],
        class_indices=class_indices,
        features=[tiles.features[r] for r in rows],
        images=[tiles.images[r] for r in rows],
        encoder=encoder,
        settings=settings,
        mode="features",
    )


def _propose(head, tiles: TileSet, rows: Sequence[int], *, mc_samples: int, seed: int):
    from labeler.model.predict import propose_tiles

    return propose_tiles(
        head,
        [tiles.features[r] for r in rows],
        tile_shapes=[tiles.shapes[r] for r in rows],
        mc_samples=mc_samples,
        seed=seed,
        images=[tiles.images[r] for r in rows],
    )


def _evaluate(head, heldout: TileSet, *, n_classes: int, mc_samples: int, seed: int) -> float:
    """Held-out mIoU of ``head``: one confusion matrix over every held-out tile."""
    cm = np.zeros((n_classes, n_classes), np.int64)
    for start in range(0, len(heldout), PROPOSE_CHUNK):
        rows = list(range(start, min(start + PROPOSE_CHUNK, len(heldout))))
        for r, prop in zip(
            rows, _propose(head, heldout, rows, mc_samples=mc_samples, seed=seed), strict=True
        ):
            cm += confusion_matrix(heldout.masks[r], prop.mask, n_classes=n_classes)
    return mean_iou(cm)


# -- picking --------------------------------------------------------------------------------------
@dataclass
class PoolScores:
    """Uncertainty scalars of the pool tiles under one head, shape (N,) each.

    Labelled tiles keep the neutral values (entropy, least confidence and BALD 0, margin
    1, fractions 0): :func:`_pick` replaces them, as the picker reads labelled tiles only
    as the reference of the diversity strategies.
    """

    entropy: np.ndarray
    margin: np.ndarray
    least_confidence: np.ndarray
    bald: np.ndarray
    fractions: np.ndarray  # (N, K)

    @classmethod
    def neutral(cls, n: int, k_classes: int) -> PoolScores:
        """Scores of a pool that was not proposed (random and coreset read none)."""
        return cls(np.zeros(n), np.ones(n), np.zeros(n), np.zeros(n), np.zeros((n, k_classes)))


def _pool_scores(head, pool: TileSet, labelled: np.ndarray, *, k_classes, mc_samples, seed):
    out = PoolScores.neutral(len(pool), k_classes)
    rows = np.flatnonzero(~labelled).tolist()
    for start in range(0, len(rows), PROPOSE_CHUNK):
        part = rows[start : start + PROPOSE_CHUNK]
        for r, p in zip(
            part, _propose(head, pool, part, mc_samples=mc_samples, seed=seed), strict=True
        ):
            out.entropy[r] = p.mean_entropy
            out.margin[r] = min(max(p.mean_margin, 0.0), 1.0)
            out.least_confidence[r] = p.mean_least_confidence
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
    scores: PoolScores | None,
) -> np.ndarray:
    """Pool rows of the next batch, the way ``labeler pick`` builds its pool."""
    n = labelled.size
    if scores is None:  # random and coreset read no uncertainty
        scores = PoolScores.neutral(n, truth_fractions.shape[1])
    pool = CandidatePool(
        ids=np.arange(n),
        embeddings=embeddings,
        entropy=np.where(labelled, 0.0, scores.entropy),
        margin=np.where(labelled, 1.0, scores.margin),
        least_confidence=np.where(labelled, 0.0, scores.least_confidence),
        bald=np.where(labelled, 0.0, scores.bald),
        class_fractions=np.where(labelled[:, None], truth_fractions, scores.fractions),
        annotators=labelled.astype(np.int64),
    )
    pick = pick_batch(pool, strategy=strategy, k=k, seed=seed)
    return np.asarray(pick.positions[: pick.n_chosen], np.int64)


# -- the simulation -------------------------------------------------------------------------------
def _check(strategies, seeds, n_initial: int, heldout: TileSet, settings: ModelSettings) -> None:
    unknown = [s for s in strategies if s not in STRATEGIES]
    if unknown or not strategies:
        raise ValueError(
            f"strategies: expected one or more of {', '.join(STRATEGIES)}, "
            f"got {list(strategies)}"
        )
    if not seeds:
        raise ValueError("seeds: expected at least one seed, got none")
    if n_initial < settings.min_labelled_tiles:
        raise ValueError(
            f"n_initial: expected at least model.min_labelled_tiles = "
            f"{settings.min_labelled_tiles} tiles (training needs them), got {n_initial}; "
            "raise the initial share"
        )
    if len(heldout) == 0:
        raise ValueError("heldout: expected at least one evaluation tile, got none")


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
        Passed to ``train_head``.
    reference_settings : ModelSettings, optional
        When given, the first seed also trains on every pool tile with these settings
        (normally the project's defaults, e.g. 40 epochs), reported as
        ``full_miou_reference``: what a shorter training budget costs at full labels.
    progress : callable, optional
        ``progress(done, total, what)`` after each retrain.

    Returns
    -------
    result : dict
        ``labelled_tiles_by_round`` (R + 1 ints), ``labelled_share_by_round``, the
        figures of :func:`~benchmarks.label_efficiency.curves.summarise_curves`
        (``full_miou``, ``full_miou_per_seed``, ``target_95pct``, ``strategies``),
        ``full_miou_reference`` and ``retrains``.

    Raises
    ------
    ValueError
        Unknown strategies, no seeds, too small an initial set or no held-out tile.
    """
    s0 = settings or ModelSettings()
    _check(strategies, seeds, n_initial, heldout, s0)
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

    def train(rows, ms):
        return _train(pool, rows, class_indices=idx, settings=ms, encoder=encoder)

    def evaluate(head, seed):
        return _evaluate(head, heldout, n_classes=n_classes, mc_samples=mc_samples, seed=seed)

    def scores_of(head, labelled, seed):
        return _pool_scores(
            head, pool, labelled, k_classes=len(idx), mc_samples=mc_samples, seed=seed
        )

    reference = None
    if reference_settings is not None:
        ms = dataclasses.replace(reference_settings, seed=int(seeds[0]))
        res = train(range(n), ms)
        reference = {
            "miou": round(evaluate(res.head, seeds[0]), 4),
            "seed": int(seeds[0]),
            "epochs_max": ms.epochs,
            "epochs_run": len(res.history),
            "best_epoch": res.best_epoch,
        }
        step(f"seed {seeds[0]}: full labels, reference training")
    curves: dict[str, list[list[float]]] = {s: [] for s in strategies}
    full = []
    for seed in seeds:
        ms = dataclasses.replace(s0, seed=int(seed))
        full.append(evaluate(train(range(n), ms).head, seed))
        step(f"seed {seed}: full labels")
        initial = np.zeros(n, bool)
        initial[np.random.default_rng(seed).choice(n, size=n_initial, replace=False)] = True
        res0 = train(np.flatnonzero(initial), ms)
        miou0 = evaluate(res0.head, seed)
        step(f"seed {seed}: round 0")
        scores0 = None
        if len(sizes) > 1 and NEEDS_PROPOSALS.intersection(strategies):
            scores0 = scores_of(res0.head, initial, seed)
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
                res = train(np.flatnonzero(labelled), ms)
                curve.append(evaluate(res.head, seed))
                if strategy in NEEDS_PROPOSALS and r + 1 < len(sizes):
                    scores = scores_of(res.head, labelled, seed)
                step(f"seed {seed}: {strategy} round {r} ({int(labelled.sum())} tiles)")
            curves[strategy].append(curve)

    summary = summarise_curves(curves, full, shares)
    return {
        "labelled_tiles_by_round": sizes,
        "labelled_share_by_round": rounded(shares),
        "full_miou": summary["full_miou"],
        "full_miou_per_seed": summary["full_miou_per_seed"],
        "target_95pct": summary["target_95pct"],
        "full_miou_reference": reference,
        "retrains": total,
        "strategies": summary["strategies"],
    }
