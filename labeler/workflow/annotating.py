"""Saving annotations, accepting and parking tiles, the queue, contested tiles.

This is the one place that decides the annotation state of a save
(:func:`save_state`) and the tile state a weak-label save leaves
(:func:`weak_label_tile_state`): every save, from the editor, the queue or a script,
goes through :func:`save_tile_mask`, which records the state it decided and returns the
row written. The editor proposes no state; it shows the one returned.
"""

from __future__ import annotations

import itertools
import math
from dataclasses import dataclass

import numpy as np

from labeler.agreement import tile_agreement
from labeler.errors import LabelerError, NotFoundError
from labeler.project import Project
from labeler.states import (
    ACCEPTED,
    AMENDED,
    CONTESTED,
    HELD,
    KIND_FULL,
    KIND_WEAK,
    PARKED,
    PROPOSED,
    SETTLED,
    UNSEEN,
    WEAK,
)
from labeler.store.records import AnnotationRecord
from labeler.workflow.reviewing import check_reviewer

__all__ = [
    "save_state",
    "weak_label_tile_state",
    "save_tile_mask",
    "accept_tile",
    "park_tile",
    "unpark_tile",
    "after_save",
    "overlap_agreement",
    "QueueRow",
    "queue_rows",
    "next_tile",
]


def save_state(
    *, kind: str, settling: bool, mask: np.ndarray, proposal: np.ndarray | None
) -> str:
    """The annotation state a save records.

    Parameters
    ----------
    kind : {KIND_FULL, KIND_WEAK}
        A whole mask, or a weak label (:mod:`labeler.states`).
    settling : bool
        True when a reviewer saves the decision on a contested tile.
    mask : ndarray, shape (H, W), uint8
        What is saved.
    proposal : ndarray, shape (H, W), uint8, or None
        The proposal the annotator started from (None when the save names none).

    Returns
    -------
    state : str
        ``weak`` for a weak label; else ``settled`` for a reviewer's decision; else
        ``accepted`` when the mask equals the proposal exactly; else ``amended``.
    """
    if kind == KIND_WEAK:
        return WEAK
    if kind != KIND_FULL:
        raise ValueError(f"kind: expected {KIND_FULL!r} or {KIND_WEAK!r}, got {kind!r}")
    if settling:
        return SETTLED
    if proposal is not None and np.array_equal(proposal, mask):
        return ACCEPTED
    return AMENDED


def weak_label_tile_state(
    tile_state: str, *, held_by: str | None, annotator: str, has_proposal: bool
) -> str | None:
    """The tile state a weak-label save leaves: None keeps the tile's state.

    A weak label is no full mask, so it never makes a tile saved. But the save ends the
    saver's hold (the store clears the holder), and a tile left ``held`` without a holder
    would be handed to nobody and released by nobody. So a tile ``held`` by the saver (or
    by nobody) goes back to where a release takes it: ``proposed`` when it has a proposal,
    else ``unseen``. A tile held by another annotator, and a tile in any other state,
    keeps its state.

    Parameters
    ----------
    tile_state : str
        The tile's state before the save (one of :data:`labeler.states.STATES`).
    held_by : str or None
        Who holds the tile before the save.
    annotator : str
        Who saves the weak label.
    has_proposal : bool
        Whether the tile has a proposal.

    Returns
    -------
    str or None
        ``proposed`` or ``unseen`` for a tile held by the saver or by nobody; None
        (the state stays) otherwise.
    """
    if tile_state != HELD or held_by not in (None, annotator):
        return None
    return PROPOSED if has_proposal else UNSEEN


def save_tile_mask(
    project: Project,
    tile_id: int,
    annotator: str,
    mask: np.ndarray,
    *,
    parent_version: int | None,
    kind: str = KIND_FULL,
    seconds: float = 0.0,
    actions: int = 0,
    source: str = "editor",
    proposal_id: int | None = None,
    settling: bool = False,
) -> AnnotationRecord:
    """Save a mask of a tile, deciding the annotation state it records.

    The state is decided here and nowhere else (:func:`save_state`): ``weak`` for
    a weak label, ``settled`` for a reviewer's decision, ``accepted`` when a full mask
    equals the proposal it started from, else ``amended``. After the save an overlap tile
    whose annotators all saved is checked for agreement (:func:`after_save`). A weak label
    leaves the tile's state as it is, except that a tile the saver held goes back to
    ``proposed`` or ``unseen`` (:func:`weak_label_tile_state`), as when the editor closes
    without a save.

    Parameters
    ----------
    project : Project
        The open project.
    tile_id : int
        The tile saved.
    annotator : str
        Who saves.
    mask : ndarray, shape (H, W), uint8
        The whole mask (``kind=KIND_FULL``) or the weak label (255 where not marked).
    parent_version : int or None
        The lineage version the edit started from (None for the first save).
    kind : {KIND_FULL, KIND_WEAK}
        What is saved.
    seconds, actions : float, int
        Effort spent, for the statistics.
    source : str
        Where the save came from (``"editor"``, ``"queue"``, ...).
    proposal_id : int, optional
        The proposal the annotator started from.
    settling : bool
        True when a reviewer saves the decision on a contested tile.

    Returns
    -------
    AnnotationRecord
        The row written; its ``state`` is the state decided for this save.

    Raises
    ------
    labeler.errors.ConflictError
        When ``parent_version`` is stale; nothing is written.
    """
    store = project.store
    if settling:
        check_reviewer(project, tile_id, annotator)
    proposal = None
    if kind == KIND_FULL and not settling and proposal_id is not None:
        proposal = store.proposal(proposal_id).mask()
    state = save_state(kind=kind, settling=settling, mask=mask, proposal=proposal)
    tile_state = None
    if kind == KIND_WEAK:
        tile = store.tile(tile_id)
        tile_state = weak_label_tile_state(
            tile.state,
            held_by=tile.held_by,
            annotator=annotator,
            has_proposal=store.latest_proposal(tile_id) is not None,
        )
    rec = store.save_annotation(
        tile_id,
        annotator,
        mask,
        parent_version=parent_version,
        kind=kind,
        state=state,
        seconds=seconds,
        actions=actions,
        source=source,
        proposal_id=proposal_id,
        tile_state=tile_state,
    )
    if kind == KIND_FULL and not settling:
        after_save(project, tile_id)
    return rec


def accept_tile(
    project: Project, tile_id: int, annotator: str, *, seconds: float = 0.0, source: str = "queue"
) -> AnnotationRecord:
    """Keep the tile's newest proposal unchanged as ``annotator``'s mask (``accepted``).

    The save names the annotator's newest version of the tile as its parent and counts as
    one action.

    Parameters
    ----------
    project : Project
        The open project.
    tile_id : int
        The tile accepted.
    annotator : str
        Who accepts.
    seconds : float
        Time spent looking at the tile, for the statistics.
    source : str
        Where the accept came from (``"queue"``, ``"script"``, ...).

    Returns
    -------
    AnnotationRecord
        The row written (state ``accepted``).

    Raises
    ------
    LabelerError
        If the tile has no proposal yet (run ``labeler propose``), is contested or
        settled (a reviewer decides those), or ``annotator`` already kept this very
        proposal (a second accept would save the same mask again).
    """
    store = project.store
    tile = store.tile(tile_id)
    if tile.state in (CONTESTED, SETTLED):
        raise LabelerError(f"tile {tile_id} is {tile.state}; a reviewer settles it in the editor")
    prop = store.latest_proposal(tile_id)
    if prop is None:
        raise LabelerError(f"tile {tile_id} has no proposal yet; run 'labeler propose' first")
    own = store.latest_annotation(tile_id, annotator=annotator, kind=KIND_FULL)
    if own is not None and own.proposal_id == prop.id and own.state == ACCEPTED:
        raise LabelerError(
            f"tile {tile_id}: {annotator} already kept this proposal (version {own.version}); "
            "nothing saved again"
        )
    parent = store.lineage_head(tile_id, annotator)
    return save_tile_mask(
        project,
        tile_id,
        annotator,
        prop.mask(),
        parent_version=parent,
        seconds=seconds,
        actions=1,
        source=source,
        proposal_id=prop.id,
    )


def park_tile(
    project: Project, tile_id: int, annotator: str, *, reason: str | None = None
) -> None:
    """Set a tile aside (``parked``); it returns to the queue when someone opens it.

    Parameters
    ----------
    project : Project
        The open project.
    tile_id : int
        The tile parked.
    annotator : str
        Who parks it (recorded in the event log).
    reason : str, optional
        Why, in the annotator's words (recorded in the event log).

    Raises
    ------
    labeler.errors.LabelerError
        If the life cycle does not allow parking the tile (e.g. a contested tile).
    """
    text = "parked by annotator" + (f": {reason.strip()}" if reason and reason.strip() else "")
    project.store.set_state(tile_id, PARKED, annotator=annotator, reason=text)


def unpark_tile(
    project: Project, tile_id: int, annotator: str, *, reason: str | None = None
) -> str:
    """Put a parked tile back in the queue: ``proposed`` (or ``unseen`` without a proposal).

    Parameters
    ----------
    project : Project
        The open project.
    tile_id : int
        A parked tile.
    annotator : str
        Who brings it back (recorded in the event log).
    reason : str, optional
        Why, recorded in the event log.

    Returns
    -------
    str
        The tile's new state.

    Raises
    ------
    labeler.errors.LabelerError
        If the tile is not parked.
    """
    store = project.store
    tile = store.tile(tile_id)
    if tile.state != PARKED:
        raise LabelerError(f"tile {tile_id} is {tile.state}, not parked; nothing to bring back")
    state = PROPOSED if store.latest_proposal(tile_id) is not None else UNSEEN
    text = "back from parked" + (f": {reason.strip()}" if reason and reason.strip() else "")
    store.set_state(tile_id, state, annotator=annotator, reason=text)
    return state


def overlap_agreement(project: Project, tile_id: int) -> float | None:
    """Lowest pairwise agreement of the newest full masks on an overlap tile.

    The metric (Cohen's kappa or IoU, :func:`labeler.agreement.tile_agreement`) is the
    project setting ``agreement.metric``; a reviewer's settled masks do not count.

    Parameters
    ----------
    project : Project
        The open project.
    tile_id : int
        The tile.

    Returns
    -------
    float or None
        The lowest agreement over every pair of annotators; None when fewer than two
        annotators have saved; NaN when no pair shares a labelled pixel.
    """
    store = project.store
    savers = store.savers(tile_id)
    if len(savers) < 2:
        return None
    masks = [store.latest_annotation(tile_id, annotator=a).mask() for a in savers]
    n_classes = project.settings.classes.n_values
    metric = project.settings.agreement.metric
    values = [
        tile_agreement(a, b, n_classes=n_classes, metric=metric)
        for a, b in itertools.combinations(masks, 2)
    ]
    finite = [v for v in values if not math.isnan(v)]
    return min(finite) if finite else math.nan


def after_save(project: Project, tile_id: int) -> float | None:
    """Move an overlap tile to ``contested`` when its annotators disagree.

    Once the configured number of annotators has saved, the lowest pairwise agreement
    is compared with the project threshold; below it, the tile becomes ``contested``
    (a reviewer settles it). Ordinary and settled tiles are left alone.

    Parameters
    ----------
    project : Project
        The open project.
    tile_id : int
        The tile just saved.

    Returns
    -------
    float or None
        The agreement (:func:`overlap_agreement`); None when the tile is no overlap tile,
        is settled, or not enough annotators have saved yet.
    """
    store = project.store
    tile = store.tile(tile_id)
    if not tile.overlap or tile.state == SETTLED:
        return None
    need = project.settings.agreement.annotators_per_tile
    if len(store.savers(tile_id)) < need:
        return None
    value = overlap_agreement(project, tile_id)
    threshold = project.settings.agreement.threshold
    if (
        value is not None
        and not math.isnan(value)
        and value < threshold
        and tile.state != CONTESTED
    ):
        store.set_state(
            tile_id,
            CONTESTED,
            reason=f"{project.settings.agreement.metric} {value:.3f} below threshold {threshold}",
        )
    return value


@dataclass(frozen=True)
class QueueRow:
    """One line of the annotators' queue.

    Attributes
    ----------
    rank : int or None
        Place in the newest pick's queue order, from 0; None for a tile outside it.
    tile_id : int
    image : str
        Name of the tile's image.
    row, col : int
        Top-left pixel of the tile in its image.
    score, reason : float or None, str or None
        The picker's score and reason (None outside the pick).
    class_fractions : tuple of float or None
        Share of each class in the newest proposal (None without one).
    state : str
        The tile's life-cycle state.
    held_by : str or None
        Who has the tile open.
    saved_by : tuple of str
        Annotators with a saved full mask (a reviewer's settled mask not counted).
    overlap : bool
        True for a tile given to several annotators.
    agreement : float or None
        :func:`overlap_agreement` once two annotators have saved an overlap tile.
    in_batch : bool
        True for a tile of the newest pick's batch.
    """

    rank: int | None
    tile_id: int
    image: str
    row: int
    col: int
    score: float | None
    reason: str | None
    class_fractions: tuple[float, ...] | None
    state: str
    held_by: str | None
    saved_by: tuple[str, ...]
    overlap: bool
    agreement: float | None
    in_batch: bool


def queue_rows(project: Project) -> list[QueueRow]:
    """Every tile in queue order: the newest pick first, then tiles outside it by id.

    Parameters
    ----------
    project : Project
        The open project.

    Returns
    -------
    list of QueueRow
        One row per tile of the project.
    """
    store = project.store
    images = {im.id: im.name for im in store.images()}
    picked = {item.tile_id: item for item in store.latest_pick()}
    proposals = store.latest_proposals()
    savers: dict[int, set[str]] = {}
    for a in store.annotations(kind=KIND_FULL):
        if a.state != SETTLED:
            savers.setdefault(a.tile_id, set()).add(a.annotator)
    rows = []
    for t in store.tiles():
        item = picked.get(t.id)
        prop = proposals.get(t.id)
        agreement = None
        if t.overlap and len(savers.get(t.id, ())) >= 2:
            agreement = overlap_agreement(project, t.id)
        rows.append(
            QueueRow(
                rank=None if item is None else item.rank,
                tile_id=t.id,
                image=images[t.image_id],
                row=t.row,
                col=t.col,
                score=None if item is None else item.score,
                reason=None if item is None else item.reason,
                class_fractions=None
                if prop is None or prop.class_fractions is None
                else tuple(prop.class_fractions),
                state=t.state,
                held_by=t.held_by,
                saved_by=tuple(sorted(savers.get(t.id, ()))),
                overlap=t.overlap,
                agreement=agreement,
                in_batch=False if item is None else item.in_batch,
            )
        )
    rows.sort(key=lambda r: (r.rank is None, r.rank if r.rank is not None else 0, r.tile_id))
    return rows


def next_tile(project: Project, annotator: str) -> int:
    """The first tile in queue order that ``annotator`` may be handed.

    Parked tiles come last. Which tiles an annotator may be handed is told by
    :meth:`labeler.store.Store.available_for` (overlap tiles go to
    ``agreement.annotators_per_tile`` annotators).

    Parameters
    ----------
    project : Project
        The open project.
    annotator : str
        Who asks.

    Returns
    -------
    int
        The tile id.

    Raises
    ------
    NotFoundError
        When nothing is left for this annotator.
    """
    per_tile = project.settings.agreement.annotators_per_tile
    available = set(project.store.available_for(annotator, per_overlap_tile=per_tile))
    for row in queue_rows(project):
        if row.tile_id in available and row.state != PARKED:
            return row.tile_id
    for row in queue_rows(project):
        if row.tile_id in available:
            return row.tile_id
    raise NotFoundError(
        f"no tile is left for annotator {annotator!r}; everything is saved or handed out"
    )
