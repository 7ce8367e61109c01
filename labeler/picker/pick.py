"""Picking the next batch: which tiles the annotators see next, in order, and why.

:func:`pick_batch` puts the candidates of a :class:`~labeler.picker.pool.CandidatePool` in
order with one of :data:`STRATEGIES` and gives each of them a score and one of
:data:`REASONS`; the first ``k`` are the batch. Masks picked here only decide which tiles people look at first; they
are not field advice (see the README for the cautions on spraying and fungicide
decisions).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from labeler.picker._checks import TINY, check_int
from labeler.picker.coreset import _k_center
from labeler.picker.pool import CandidatePool
from labeler.picker.tile_scores import disagreement_scores, rarity_weights
from labeler.settings import STRATEGIES, UNCERTAINTY_MEASURES

__all__ = ["STRATEGIES", "REASONS", "Pick", "pick_batch"]

#: The reason strings of a :class:`Pick`, one per candidate.
REASONS = (
    "uncertain", "rare class", "unlike labelled tiles", "annotators disagree",
    "unlike the other picks",
)
_UNCERTAIN, _RARE_CLASS, _UNLIKE_LABELLED, _DISAGREE, _UNLIKE_PICKS = REASONS


def _unlike(lab_rows: np.ndarray) -> str:
    """The diversity reason: labelled tiles to be unlike only when some exist."""
    return _UNLIKE_LABELLED if lab_rows.size else _UNLIKE_PICKS

#: Strategies that order by one tile uncertainty measure of the same name.
_BY_MEASURE = ("entropy", "margin", "bald")


@dataclass(frozen=True, eq=False)
class Pick:
    """The picker's answer: every candidate in pick order, the batch first.

    Attributes
    ----------
    strategy : str
        The strategy that ordered the unlabelled candidates.
    k : int
        The batch size asked for.
    ids : ndarray, shape (n,)
        Candidate tile ids in pick order; the first ``n_chosen`` are the batch.
    positions : ndarray, shape (n,), int64
        Pool row of each candidate.
    scores : ndarray, shape (n,)
        The strategy's score of each candidate (see :func:`pick_batch`).
    reasons : tuple of str, length n
        One of :data:`REASONS` per candidate.
    n_chosen : int
        ``min(k, n)``.
    """

    strategy: str
    k: int
    ids: np.ndarray
    positions: np.ndarray
    scores: np.ndarray
    reasons: tuple[str, ...]
    n_chosen: int

    @property
    def chosen(self) -> np.ndarray:
        """Ids of the batch, in order."""
        return self.ids[: self.n_chosen]

    def __len__(self) -> int:
        """Number of candidates n."""
        return int(self.ids.shape[0])

    def rows(self) -> list[tuple[object, float, str]]:
        """``(id, score, reason)`` per candidate, in pick order."""
        return [
            (i, float(s), r) for i, s, r in zip(self.ids.tolist(), self.scores, self.reasons, strict=True)
        ]


def _order_desc(score: np.ndarray) -> np.ndarray:
    """Positions sorted by score descending, ties by position ascending."""
    return np.lexsort((np.arange(score.size), -score))


def _ratio(values: np.ndarray, reference: np.ndarray) -> np.ndarray:
    """``values`` divided by the median of ``reference`` (floored at TINY)."""
    med = float(np.median(reference)) if reference.size else 0.0
    return values / max(med, TINY)


def _dominant(ratios: Sequence[np.ndarray], labels: Sequence[str]) -> list[str]:
    """Per tile, the label of the largest ratio (the earlier label wins ties)."""
    stacked = np.stack(ratios)
    return [labels[j] for j in np.argmax(stacked, axis=0)]


def _check_names(pool: object, *, strategy: str, uncertainty: str) -> None:
    """Raise for an unknown strategy or measure, or a pool of another type."""
    if strategy not in STRATEGIES:
        raise ValueError(
            f"strategy: expected one of {', '.join(STRATEGIES)}, got {strategy!r}"
        )
    if uncertainty not in UNCERTAINTY_MEASURES:
        raise ValueError(
            f"uncertainty: expected one of {', '.join(UNCERTAINTY_MEASURES)}, "
            f"got {uncertainty!r}"
        )
    if not isinstance(pool, CandidatePool):
        raise TypeError(f"pool: expected a CandidatePool, got {type(pool).__name__}")


def pick_batch(
    pool: CandidatePool,
    *,
    strategy: str = "mixed",
    k: int,
    seed: int = 0,
    uncertainty: str = "entropy",
    top_m: int | None = None,
    rarity_power: float = 1.0,
    rarity_smoothing: float = 0.01,
    agreement_threshold: float = 0.6,
    include_contested: bool = True,
) -> Pick:
    """Put the candidate tiles of ``pool`` in order and pick the next batch of ``k``.

    Candidates are the unlabelled tiles (``annotators == 0``) and, when
    ``include_contested``, the *contested* tiles: two or more annotators whose agreement is
    below ``agreement_threshold``. Tiles with one annotator, and overlapped tiles that
    agree (or whose agreement is not known yet), are never candidates; all labelled tiles
    are the labelled set of the diversity strategies.

    Contested tiles come first (a reviewer should see them), by
    :func:`~labeler.picker.tile_scores.disagreement_scores` descending, with score ``1 - agreement`` and reason
    ``"annotators disagree"``; they take batch slots. The unlabelled candidates follow in
    the strategy's order:

    ``random``
        A permutation from ``numpy.random.default_rng(seed)``; score ``1 - rank / n``.
    ``entropy``, ``bald``
        Tile mean entropy / BALD, largest first (BALD needs dropout samples: NaN BALD on a
        candidate is an error).
    ``margin``
        Smallest tile mean margin first; score ``1 - margin``.
    ``coreset``
        Greedy k-center (:func:`~labeler.picker.coreset.k_center_greedy`) over all unlabelled candidates for the
        batch, score = distance to the nearest labelled or earlier chosen tile at pick
        time; the rest follow by distance to the nearest labelled or chosen tile.
    ``mixed`` (default)
        Uncertainty-weighted diversity. Each unlabelled tile weighs
        ``u_i * rho_i``: ``u`` the ``uncertainty`` measure (``1 - margin`` for margin)
        and ``rho`` its :func:`~labeler.picker.tile_scores.rarity_weights` (reference: the labelled tiles' fractions,
        or the pool's while nothing is labelled). The ``top_m`` heaviest tiles (default
        ``max(3 k, ceil(n / 10))``) go through weighted greedy k-center; the batch is its
        pick order, the rest follow by weight. Score = weight.

    Only ``random`` uses ``seed``; every other strategy is deterministic, ties going to the
    lower pool row.

    Reasons (which cause dominates): ``"annotators disagree"`` for contested tiles;
    ``"uncertain"`` for entropy, margin and bald; ``"unlike labelled tiles"`` for coreset
    (``"unlike the other picks"`` while nothing is labelled: the distances are then to
    the candidates' mean and the tiles chosen before).
    For mixed and random each factor is divided by its median over the unlabelled
    candidates (the uncertainty ``u``, the rarity weight ``rho``; for tiles of the
    mixed batch also the distance at pick time, divided by the median distance of the
    pre-selected tiles left out of the batch), and the largest ratio names the reason:
    ``"uncertain"``, ``"rare class"`` or ``"unlike labelled tiles"`` (ties in that order).
    For random the reason only describes the tile; it did not cause the pick.

    Parameters
    ----------
    pool : CandidatePool
        Every tile of the project, N rows.
    strategy : str
        One of :data:`STRATEGIES`.
    k : int
        Batch size, >= 1; fewer tiles are chosen when fewer candidates exist.
    seed : int
        Seed of ``random``.
    uncertainty : str
        Measure of ``mixed`` (and of the reasons of ``random``): one of
        :data:`UNCERTAINTY_MEASURES`.
    top_m : int, optional
        Size of the pre-selection of ``mixed`` (>= 1; raised to k when smaller).
    rarity_power, rarity_smoothing : float
        Passed to :func:`~labeler.picker.tile_scores.rarity_weights`.
    agreement_threshold : float
        Overlapped tiles agreeing less than this are contested (settings
        ``agreement.threshold``).
    include_contested : bool
        False leaves contested tiles out of the pick.

    Returns
    -------
    Pick
        n candidates in order (contested, then unlabelled ones), the first ``min(k, n)``
        the batch.

    Raises
    ------
    ValueError
        Unknown strategy or measure, k < 1, top_m < 1, or NaN BALD where BALD is needed.
    TypeError
        ``pool`` is not a CandidatePool.
    """
    _check_names(pool, strategy=strategy, uncertainty=uncertainty)
    k = check_int(k, "k", minimum=1)
    seed = check_int(seed, "seed", minimum=0)
    if top_m is not None:
        top_m = check_int(top_m, "top_m", minimum=1)
    if not math.isfinite(agreement_threshold):
        raise ValueError(
            f"agreement_threshold: expected a finite number, got {agreement_threshold}"
        )

    labelled = pool.labelled
    lab_rows = np.flatnonzero(labelled)
    unl = np.flatnonzero(~labelled)

    # contested tiles first
    contested = (pool.annotators >= 2) & ~np.isnan(pool.agreement)
    contested &= np.nan_to_num(pool.agreement, nan=np.inf) < agreement_threshold
    con = np.flatnonzero(contested) if include_contested else np.zeros(0, np.int64)
    dis = disagreement_scores(pool.agreement)[con]
    con_perm = _order_desc(dis)
    con_order, con_scores = con[con_perm], dis[con_perm]
    k_rest = max(k - con.size, 0)

    # the strategy over the unlabelled candidates
    if unl.size == 0:
        order, scores, reasons = np.zeros(0, np.int64), np.zeros(0), []
    elif strategy in _BY_MEASURE:
        order, scores, reasons = _order_by_measure(pool, unl, strategy)
    elif strategy == "coreset":
        order, scores, reasons = _order_coreset(pool, unl, lab_rows, k=k_rest)
    else:
        u = _measure(pool, uncertainty, unl)
        labelled_fractions = pool.class_fractions[lab_rows] if lab_rows.size else None
        rho = rarity_weights(
            pool.class_fractions[unl],
            labelled_fractions=labelled_fractions,
            smoothing=rarity_smoothing,
            power=rarity_power,
        )
        if strategy == "random":
            order, scores, reasons = _order_random(unl, u, rho, seed=seed)
        else:
            order, scores, reasons = _order_mixed(
                pool, unl, lab_rows, u, rho, k=k_rest, top_m=top_m
            )
    positions = np.concatenate([con_order, order]).astype(np.int64)
    all_scores = np.concatenate([con_scores, scores])
    all_reasons = (_DISAGREE,) * con.size + tuple(reasons)
    return Pick(
        strategy=strategy,
        k=k,
        ids=pool.ids[positions],
        positions=positions,
        scores=all_scores,
        reasons=all_reasons,
        n_chosen=min(k, positions.size),
    )


#: Pool rows in order, their scores and their reasons.
_Order = tuple[np.ndarray, np.ndarray, list[str]]


def _measure(pool: CandidatePool, name: str, rows: np.ndarray) -> np.ndarray:
    """Uncertainty ``name`` of the pool rows ``rows``, large = uncertain (1 - margin)."""
    if name == "margin":
        return 1.0 - pool.margin[rows]
    values = getattr(pool, name)[rows]
    if name == "bald" and np.isnan(values).any():
        bad = rows[np.isnan(values)]
        raise ValueError(
            f"pool.bald: NaN for {bad.size} candidate tile(s) (first ids "
            f"{pool.ids[bad[:3]].tolist()}); BALD needs MC-dropout samples: propose with "
            "model.mc_samples >= 2, or pick another strategy or uncertainty measure"
        )
    return values


def _order_by_measure(pool: CandidatePool, unl: np.ndarray, name: str) -> _Order:
    """entropy, margin, bald: the measure, largest first."""
    score = _measure(pool, name, unl)
    perm = _order_desc(score)
    return unl[perm], score[perm], [_UNCERTAIN] * unl.size


def _order_coreset(
    pool: CandidatePool, unl: np.ndarray, lab_rows: np.ndarray, *, k: int
) -> _Order:
    """coreset: greedy k-center batch, then the rest by distance to the nearest center."""
    x = pool.embeddings
    n_u = unl.size
    xc = x if n_u == len(pool) else x[unl]
    run = _k_center(xc, x[lab_rows], k, None)
    rest = np.setdiff1d(np.arange(n_u), run.order, assume_unique=True)
    rest = rest[_order_desc(run.final_dist[rest])]
    perm = np.concatenate([run.order, rest])
    score = np.concatenate([run.pick_dist, run.final_dist[rest]])
    return unl[perm], score, [_unlike(lab_rows)] * n_u


def _order_random(unl: np.ndarray, u: np.ndarray, rho: np.ndarray, *, seed: int) -> _Order:
    """random: a seeded permutation; the reasons only describe the tiles."""
    n_u = unl.size
    perm = np.random.default_rng(seed).permutation(n_u)
    score = 1.0 - np.arange(n_u) / n_u
    reasons = _dominant([_ratio(u, u)[perm], _ratio(rho, rho)[perm]], [_UNCERTAIN, _RARE_CLASS])
    return unl[perm], score, reasons


def _order_mixed(
    pool: CandidatePool,
    unl: np.ndarray,
    lab_rows: np.ndarray,
    u: np.ndarray,
    rho: np.ndarray,
    *,
    k: int,
    top_m: int | None,
) -> _Order:
    """mixed: weighted k-center over the top-M by weight ``u * rho``, then by weight."""
    n_u = unl.size
    u_ratio, r_ratio = _ratio(u, u), _ratio(rho, rho)
    weight = u * rho
    by_weight = _order_desc(weight)
    if k == 0:
        reasons = _dominant([u_ratio[by_weight], r_ratio[by_weight]], [_UNCERTAIN, _RARE_CLASS])
        return unl[by_weight], weight[by_weight], reasons
    m = top_m if top_m is not None else max(3 * k, math.ceil(n_u / 10))
    m = min(max(m, k), n_u)
    pre = np.sort(by_weight[:m])  # ascending rows: k-center ties go to the lower row
    x = pool.embeddings
    run = _k_center(x[unl[pre]], x[lab_rows], k, weight[pre])
    chosen = pre[run.order]
    ref = np.setdiff1d(np.arange(m), run.order, assume_unique=True)
    ref_dist = run.final_dist[ref] if ref.size else run.pick_dist
    d_ratio = _ratio(run.pick_dist, ref_dist)
    chosen_reasons = _dominant(
        [u_ratio[chosen], r_ratio[chosen], d_ratio], [_UNCERTAIN, _RARE_CLASS, _unlike(lab_rows)]
    )
    is_chosen = np.zeros(n_u, bool)
    is_chosen[chosen] = True
    rest = by_weight[~is_chosen[by_weight]]
    rest_reasons = _dominant([u_ratio[rest], r_ratio[rest]], [_UNCERTAIN, _RARE_CLASS])
    perm = np.concatenate([chosen, rest])
    return unl[perm], weight[perm], chosen_reasons + rest_reasons
