"""Picking the queue order with the active-learning picker (``labeler pick``)."""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from labeler.errors import LabelerError
from labeler.metrics import class_fractions
from labeler.picker import CandidatePool, pick_batch
from labeler.project import Project
from labeler.states import KIND_FULL, SETTLED
from labeler.store.records import PickItem
from labeler.workflow.annotating import overlap_agreement
from labeler.workflow.progress import Progress, no_progress

__all__ = ["PickedTile", "PickResult", "pick_tiles"]


@dataclass(frozen=True)
class PickedTile:
    """A tile of the new batch and where it lies, for showing the batch.

    Attributes
    ----------
    rank : int
        Place in the queue order, from 0.
    tile_id : int
    image : str
        Name of the tile's image.
    row, col : int
        Top-left pixel of the tile in its image.
    score : float
        The picker's score.
    reason : str
        Why the picker chose it.
    """

    rank: int
    tile_id: int
    image: str
    row: int
    col: int
    score: float
    reason: str


@dataclass(frozen=True)
class PickResult:
    """What ``labeler pick`` did.

    Attributes
    ----------
    strategy : str
        The strategy used (cold-start proposals carry no uncertainty, so the uncertainty
        strategies fall back to ``coreset`` until a head is trained).
    requested : str
        The strategy asked for.
    k : int
        Batch size.
    items : list of PickItem
        Every picked tile in queue order, as written to the store.
    without_proposal : int
        Tiles without a proposal (left out of the pick).
    note : str
        Why the strategy used differs from the one asked for, if it does.
    batch : list of PickedTile
        The first ``k`` tiles with their image and position.
    """

    strategy: str
    requested: str
    k: int
    items: list[PickItem]
    without_proposal: int
    note: str = ""
    batch: list[PickedTile] = field(default_factory=list)


def pick_tiles(
    project: Project,
    *,
    strategy: str | None = None,
    k: int | None = None,
    seed: int | None = None,
    progress: Progress = no_progress,
    cluster: str | None = None,
) -> PickResult:
    """Pick: put every proposed tile in queue order and write the order to the store.

    Parameters
    ----------
    project : Project
        An open project.
    strategy : str, optional
        One of random, entropy, margin, bald, coreset, mixed (default: the setting).
    k : int, optional
        Batch size (default: the setting); the whole pool is put in order, the first
        k are the batch.
    seed : int, optional
        Seed for ``random`` (default: the setting).
    progress : Progress
        Called as ``progress(done, total, label)``.
    cluster : str, optional
        Address of a Dask scheduler: tiles without an embedding get one there first
        (:func:`labeler.workflow.cluster.embed_on_cluster`), so the whole pool is scored.

    Returns
    -------
    PickResult
        The queue order written to the store and the new batch.

    Raises
    ------
    LabelerError
        If no tile has a proposal with an embedding yet (run ``labeler propose``).
    """
    if cluster:  # the encoder pass on the cluster; Dask is imported there only
        from labeler.workflow.cluster import embed_on_cluster

        embed_on_cluster(project, address=cluster, progress=progress)
    ps = project.settings.picker
    strategy = ps.strategy if strategy is None else strategy
    k = ps.k if k is None else k
    seed = ps.seed if seed is None else seed
    store = project.store
    schema = project.settings.classes
    tiles = store.tiles()
    proposals = store.latest_proposals()
    progress(0, 3, "reading proposals")
    savers: dict[int, set[str]] = {}
    for a in store.annotations(kind=KIND_FULL):
        if a.state != SETTLED:
            savers.setdefault(a.tile_id, set()).add(a.annotator)
    ids, emb, ent, mar, lc, bald, frac, ann, agr = [], [], [], [], [], [], [], [], []
    have_uncertainty = False
    for t in tiles:
        p = proposals.get(t.id)
        if p is None or p.embedding_npy is None:
            continue
        e = p.embedding()
        n_saved = len(savers.get(t.id, ()))
        if t.state == SETTLED:
            n_saved = 1
        fr = np.asarray(
            p.class_fractions if p.class_fractions is not None else np.zeros(len(schema)),
            np.float64,
        )
        if n_saved >= 1:
            latest = store.latest_annotation(t.id)
            if latest is not None:
                fr = class_fractions(latest.mask(), schema.indices)
        a_val = math.nan
        if n_saved >= 2:
            v = overlap_agreement(project, t.id)
            a_val = math.nan if v is None else v
        if p.mean_entropy is not None:
            have_uncertainty = True
        ids.append(t.id)
        emb.append(e)
        ent.append(p.mean_entropy or 0.0)
        mar.append(1.0 if p.mean_margin is None else p.mean_margin)
        lc.append(p.mean_least_confidence or 0.0)
        bald.append(math.nan if p.mean_bald is None else p.mean_bald)
        frac.append(fr)
        ann.append(n_saved)
        agr.append(a_val)
    if not ids:
        raise LabelerError(
            "no tile has a proposal with an embedding yet; run 'labeler propose' first"
        )
    progress(1, 3, "scoring")
    used = strategy
    note = ""
    if not have_uncertainty and strategy not in ("random", "coreset"):
        used = "coreset"
        note = (
            "the proposals come from the cold start and carry no model uncertainty, so tiles are "
            "picked for diversity (coreset) until a model is trained"
        )
    pool = CandidatePool(
        ids=ids,
        embeddings=np.stack(emb).astype(np.float32),
        entropy=np.array(ent),
        margin=np.array(mar),
        least_confidence=np.array(lc),
        class_fractions=np.stack(frac),
        bald=np.array(bald),
        annotators=np.array(ann),
        agreement=np.array(agr),
    )
    pick = pick_batch(
        pool,
        strategy=used,
        k=k,
        seed=seed,
        agreement_threshold=project.settings.agreement.threshold,
    )
    items = [
        PickItem(
            tile_id=int(tid), rank=r, score=float(sc), reason=str(rs), in_batch=r < pick.n_chosen
        )
        for r, (tid, sc, rs) in enumerate(zip(pick.ids, pick.scores, pick.reasons, strict=True))
    ]
    progress(2, 3, "writing the queue")
    store.write_pick(strategy=used, k=k, seed=seed, items=items)
    progress(3, 3, "done")
    by_id = {t.id: t for t in tiles}
    names = {im.id: im.name for im in store.images()}
    batch = [
        PickedTile(
            rank=item.rank,
            tile_id=item.tile_id,
            image=names[by_id[item.tile_id].image_id],
            row=by_id[item.tile_id].row,
            col=by_id[item.tile_id].col,
            score=item.score,
            reason=item.reason,
        )
        for item in items[:k]
    ]
    return PickResult(
        strategy=used,
        requested=strategy,
        k=k,
        items=items,
        without_proposal=len(tiles) - len(ids),
        note=note,
        batch=batch,
    )
