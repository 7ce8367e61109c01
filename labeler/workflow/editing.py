"""The edit stage: what the mask editor starts from, and saving its work through the store.

:func:`begin_edit` gathers what an annotator (or a reviewer settling a contested tile)
starts from and marks the tile held; :class:`StoreBackend` is where the editor saves: it
implements the editor's backend interface (:class:`labeler.editor.backend.EditorBackend`)
by duck typing, so the workflow imports nothing from the editor (its ``relearn`` re-fits
the newest head on the annotator's marks, :mod:`labeler.workflow.learning`); :func:`end_edit` gives
the tile back when the editor closes. The window itself is opened by
:mod:`labeler.editor.opening`.

Every save goes through :func:`labeler.workflow.annotating.save_tile_mask`, which decides
the annotation state; :meth:`StoreBackend.save` returns the state written.
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np

from labeler.agreement import staple
from labeler.classes import UNLABELLED
from labeler.errors import ConflictError, LabelerError
from labeler.imagery.read import open_image
from labeler.project import Project
from labeler.states import CONTESTED, SETTLED
from labeler.store.records import DraftRecord
from labeler.workflow.annotating import save_tile_mask
from labeler.workflow.learning import TileRelearner, tile_relearner
from labeler.workflow.reviewing import check_reviewer

__all__ = ["StoreBackend", "EditStart", "begin_edit", "end_edit"]


class StoreBackend:
    """The editor's backend over the project store (implements ``EditorBackend``).

    Every save names the version the tile was opened at, so a save after someone else's
    raises :class:`labeler.errors.ConflictError` (carrying their mask) and writes
    nothing; the editor then keeps the work as a draft.

    Parameters
    ----------
    project : Project
        The open project.
    tile_id : int
        The tile edited.
    annotator : str
        Who edits.
    parent_version : int or None
        The lineage version the edit starts from.
    proposal_id : int or None
        The proposal the edit starts from (None when settling or without a proposal).
    settling : bool
        True when a reviewer settles a contested tile.
    """

    def __init__(
        self,
        project: Project,
        tile_id: int,
        annotator: str,
        *,
        parent_version: int | None,
        proposal_id: int | None,
        settling: bool = False,
    ) -> None:
        self.project = project
        self.tile_id = tile_id
        self.annotator = annotator
        self.parent_version = parent_version
        self.proposal_id = proposal_id
        self.settling = settling
        self.saved: list[int] = []
        self._relearner: TileRelearner | None = None
        self._no_head = False

    def save(self, mask: np.ndarray, *, kind: str, actions: int, seconds: float) -> str:
        """Save through :func:`save_tile_mask`, which decides the annotation state.

        Parameters
        ----------
        mask : ndarray, shape (H, W), uint8
            The mask (``kind=KIND_FULL``) or the weak label (``kind=KIND_WEAK``).
        kind : {KIND_FULL, KIND_WEAK}
            A full mask or a weak label (:mod:`labeler.states`).
        actions, seconds : int, float
            Effort spent.

        Returns
        -------
        state : str
            The annotation state the store recorded.

        Raises
        ------
        labeler.errors.ConflictError
            When someone saved the tile since it was opened; its ``theirs`` is their mask
            as an (H, W) uint8 array (or None). Nothing is written.
        """
        try:
            rec = save_tile_mask(
                self.project,
                self.tile_id,
                self.annotator,
                np.asarray(mask, np.uint8),
                parent_version=self.parent_version,
                kind=kind,
                seconds=seconds,
                actions=actions,
                source="editor",
                proposal_id=self.proposal_id,
                settling=self.settling,
            )
        except ConflictError as exc:
            theirs = exc.theirs.mask() if exc.theirs is not None else None
            raise ConflictError(
                str(exc),
                tile_id=exc.tile_id,
                parent_version=exc.parent_version,
                current_version=exc.current_version,
                theirs=theirs,
            ) from None
        self.parent_version = rec.version
        self.saved.append(rec.version)
        return rec.state

    def relearn(self, marks: np.ndarray) -> np.ndarray | None:
        """The tile's proposal re-fitted on the annotator's marks, or None without a head.

        The newest head, the tile's cached features and its pixels are gathered once per
        editing session (:func:`labeler.workflow.learning.tile_relearner`); each call then
        re-fits in well under a second.

        Parameters
        ----------
        marks : ndarray, shape (H, W), uint8
            Class index where marked (weak label, hand corrections), 255 elsewhere.

        Returns
        -------
        mask : ndarray, shape (H, W), uint8, or None
            None when the project has no trained head yet.
        """
        if self._no_head:
            return None
        if self._relearner is None:
            self._relearner = tile_relearner(self.project, self.tile_id)
            if self._relearner is None:
                self._no_head = True
                return None
        return self._relearner(marks)

    def save_draft(
        self, mask: np.ndarray, weak_label: np.ndarray, *, actions: int, seconds: float
    ) -> None:
        """Keep unsaved work as the tile's draft for this annotator (replacing an older one).

        Parameters
        ----------
        mask, weak_label : ndarray, shape (H, W), uint8
        actions, seconds : int, float
            Effort spent so far.
        """
        self.project.store.save_draft(
            self.tile_id,
            self.annotator,
            mask,
            weak_label=weak_label,
            parent_version=self.parent_version,
            seconds=seconds,
            actions=actions,
        )

    def load_draft(self) -> DraftRecord | None:
        """The draft of an earlier session, for the editor to offer back.

        Returns
        -------
        DraftRecord or None
            The draft with its weak label (all 255 when it kept none); None when there
            is no draft.
        """
        d = self.project.store.load_draft(self.tile_id, self.annotator)
        if d is None:
            return None
        if d.weak_label is None:
            d = replace(d, weak_label=np.full(d.mask.shape, UNLABELLED, np.uint8))
        return d

    def discard_draft(self) -> None:
        """Forget the draft (no error when there is none)."""
        self.project.store.discard_draft(self.tile_id, self.annotator)

    def heartbeat(self) -> bool:
        """Renew this annotator's hold on the tile (the store's lease).

        Returns
        -------
        bool
            False when the hold lapsed or was released; saving still works and is
            checked for conflicts as always.
        """
        return self.project.store.heartbeat(self.tile_id, self.annotator)


@dataclass(frozen=True)
class EditStart:
    """What the editor starts from for one tile.

    Parameters
    ----------
    tile_id : int
    image_name : str
        Name of the image the tile belongs to.
    row, col : int
        Tile position in its image, pixels.
    image : ndarray, shape (H, W, 3), uint8
        The RGB tile.
    proposal : ndarray, shape (H, W), uint8
        The newest proposal (all soil without one): what "accepted" compares with and
        what erasing brings back.
    mask : ndarray, shape (H, W), uint8
        The mask the edit starts from.
    uncertainty : ndarray, shape (h, w), float64, or None
        The proposal's per-pixel entropy, for the heat map.
    compare : ndarray, shape (H, W), uint8, or None
        A second mask to show beside the edit (settling: the first annotator's).
    compare_label : str or None
        Who made ``compare``.
    backend : StoreBackend
        Where the edit saves.
    annotations : tuple of (str, ndarray)
        Settling: every annotator's newest full mask, ``(name, (H, W) uint8)``, in the
        store's order of savers; () otherwise.
    """

    tile_id: int
    image_name: str
    row: int
    col: int
    image: np.ndarray
    proposal: np.ndarray
    mask: np.ndarray
    uncertainty: np.ndarray | None
    compare: np.ndarray | None
    compare_label: str | None
    backend: StoreBackend
    annotations: tuple[tuple[str, np.ndarray], ...] = ()


def begin_edit(
    project: Project, tile_id: int, annotator: str, *, settle: bool = False
) -> EditStart:
    """Gather what ``annotator`` starts editing ``tile_id`` from, and mark the tile held.

    The edit starts from the annotator's own newest mask, else the newest proposal,
    else all soil. On an overlap tile an annotator never sees another's mask. With
    ``settle`` (a reviewer deciding a contested tile) it starts from the STAPLE
    consensus of the annotators' masks, with every annotator's mask to compare.

    Parameters
    ----------
    project : Project
        The open project.
    tile_id : int
        The tile to edit.
    annotator : str
        Who edits (the reviewer when settling).
    settle : bool
        Settle a contested tile.

    Returns
    -------
    EditStart

    Raises
    ------
    LabelerError
        If ``settle`` is asked for a tile that is not contested, or without two masks.
    """
    store = project.store
    schema = project.settings.classes
    tile = store.tile(tile_id)
    image = store.image(tile.image_id)
    with open_image(project.image_path(image)) as reader:
        rgb = reader.read(tile.window)
    proposal = store.latest_proposal(tile_id)
    base = proposal.mask() if proposal is not None else np.zeros(tile.shape, np.uint8)
    compare = None
    compare_label = None
    annotations: tuple[tuple[str, np.ndarray], ...] = ()
    if settle:
        if tile.state != CONTESTED and tile.state != SETTLED:
            raise LabelerError(
                f"tile {tile_id} is {tile.state}, not contested; only contested tiles are settled"
            )
        check_reviewer(project, tile_id, annotator)
        savers = store.savers(tile_id)
        if len(savers) < 2:
            raise LabelerError(
                f"tile {tile_id}: settling needs two annotators' masks, found {len(savers)}"
            )
        masks = np.stack([store.latest_annotation(tile_id, annotator=a).mask() for a in savers])
        result = staple(masks, n_classes=schema.n_values)
        start = result.consensus.copy()
        start[start == UNLABELLED] = masks[0][start == UNLABELLED]
        compare, compare_label = masks[0], savers[0]
        annotations = tuple((name, m) for name, m in zip(savers, masks, strict=True))
        parent = store.lineage_head(tile_id, annotator, settling=True)
    else:
        own = store.visible_annotation(tile_id, annotator)
        start = own.mask() if own is not None else base
        start = np.where(start == UNLABELLED, 0, start).astype(np.uint8)
        parent = store.lineage_head(tile_id, annotator)
    uncertainty = None
    if proposal is not None and proposal.uncertainty() is not None:
        uncertainty = np.asarray(proposal.uncertainty()[0], np.float64)  # entropy channel
    backend = StoreBackend(
        project,
        tile_id,
        annotator,
        parent_version=parent,
        proposal_id=None if proposal is None or settle else proposal.id,
        settling=settle,
    )
    store.hold(tile_id, annotator)
    return EditStart(
        tile_id=tile_id,
        image_name=image.name,
        row=tile.row,
        col=tile.col,
        image=rgb,
        proposal=base,
        mask=start,
        uncertainty=uncertainty,
        compare=compare,
        compare_label=compare_label,
        backend=backend,
        annotations=annotations,
    )


def end_edit(project: Project, tile_id: int, annotator: str) -> None:
    """The editor closed: give the tile back if ``annotator`` still holds it.

    A tile left without a save goes back from ``held`` to its earlier state (a draft,
    if any, is kept); after a save the tile is no longer held and nothing changes.

    Parameters
    ----------
    project : Project
    tile_id : int
    annotator : str
    """
    if project.store.tile(tile_id).held_by == annotator:
        project.store.release(tile_id, annotator)


def release_tile(project: Project, tile_id: int, *, by: str) -> tuple[str | None, str]:
    """Give a held tile back, whoever holds it (``labeler release``).

    For a tile whose editor crashed or whose annotator left before its hold lapsed.
    The tile goes back as when its editor closes without a save; drafts are kept.

    Parameters
    ----------
    project : Project
    tile_id : int
    by : str
        Who releases it; recorded in the event log.

    Returns
    -------
    (holder, state) : (str or None, str)
        Who held the tile (None when nobody did) and its state afterwards.

    Raises
    ------
    NotFoundError
        If the tile is not in the project.
    """
    holder = project.store.tile(tile_id).held_by
    after = project.store.release(tile_id, by)
    return holder, after.state
