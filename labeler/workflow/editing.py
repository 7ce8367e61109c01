"""Opening a tile in the mask editor (``labeler edit``), saving through the store."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from labeler.agreement import staple
from labeler.classes import UNLABELLED
from labeler.editor.backend import Draft
from labeler.editor.state import EditorState, fit_view_shape
from labeler.editor.window import EditorOutcome, require_display, run_editor
from labeler.errors import ConflictError, LabelerError
from labeler.imagery.read import open_image
from labeler.project import Project
from labeler.states import CONTESTED, SETTLED
from labeler.workflow.annotating import next_tile, save_tile_mask

__all__ = ["StoreBackend", "EditSession", "open_edit_session", "edit_tile"]


class StoreBackend:
    """The editor's :class:`labeler.editor.backend.EditorBackend` over the project store.

    Every save names the version the tile was opened at, so a save after someone else's
    raises :class:`labeler.errors.ConflictError` (carrying their mask) and writes
    nothing; the editor then keeps the work as a draft.
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

    def save(
        self, mask: np.ndarray, *, kind: str, state: str, actions: int, seconds: float
    ) -> None:
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
                settling=self.settling and kind == "full",
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

    def save_draft(
        self, mask: np.ndarray, scribbles: np.ndarray, *, actions: int, seconds: float
    ) -> None:
        self.project.store.save_draft(
            self.tile_id,
            self.annotator,
            mask,
            scribbles=scribbles,
            parent_version=self.parent_version,
            seconds=seconds,
            actions=actions,
        )

    def load_draft(self) -> Draft | None:
        d = self.project.store.load_draft(self.tile_id, self.annotator)
        if d is None:
            return None
        scrib = (
            d.scribbles if d.scribbles is not None else np.full(d.mask.shape, UNLABELLED, np.uint8)
        )
        return Draft(mask=d.mask, scribbles=scrib, actions=d.actions, seconds=d.seconds)

    def discard_draft(self) -> None:
        self.project.store.discard_draft(self.tile_id, self.annotator)


@dataclass
class EditSession:
    """Everything :func:`edit_tile` hands to the editor window."""

    state: EditorState
    backend: StoreBackend
    title: str
    compare_with: str | None = None


def open_edit_session(
    project: Project, tile_id: int, annotator: str, *, settle: bool = False
) -> EditSession:
    """Prepare the editor state of a tile for ``annotator`` and mark the tile held.

    The editor starts from the annotator's own newest mask, else the newest proposal,
    else all soil. On an overlap tile an annotator never sees another's mask. With
    ``settle`` (a reviewer deciding a contested tile) it starts from the STAPLE
    consensus of the annotators' masks and shows the first annotator's mask beside it.

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
    if settle:
        if tile.state != CONTESTED and tile.state != SETTLED:
            raise LabelerError(
                f"tile {tile_id} is {tile.state}, not contested; only contested tiles are settled"
            )
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
        parent = store.lineage_head(tile_id, annotator, settling=True)
    else:
        own = store.visible_annotation(tile_id, annotator)
        start = own.mask() if own is not None else base
        start = np.where(start == UNLABELLED, 0, start).astype(np.uint8)
        parent = store.lineage_head(tile_id, annotator)
    uncertainty = None
    if proposal is not None and proposal.uncertainty() is not None:
        uncertainty = np.asarray(proposal.uncertainty()[0], np.float64)  # entropy channel
    view = fit_view_shape(tile.shape)
    state = EditorState(
        rgb,
        base,
        schema=schema,
        mask=start,
        uncertainty=uncertainty,
        opacity=project.settings.editor.opacity,
        view_shape=view,
    )
    if compare is not None:
        state.set_compare(compare, label=compare_label)
    backend = StoreBackend(
        project,
        tile_id,
        annotator,
        parent_version=parent,
        proposal_id=None if proposal is None or settle else proposal.id,
        settling=settle,
    )
    store.hold(tile_id, annotator)
    title = f"labeler edit - {image.name} - tile {tile_id} at row {tile.row} col {tile.col}"
    return EditSession(state=state, backend=backend, title=title, compare_with=compare_label)


def edit_tile(
    project: Project, tile_id: int | None, annotator: str, *, settle: bool = False, gui=None
) -> tuple[int, EditorOutcome]:
    """Open the editor window on a tile (or the annotator's next tile) until it closes.

    Returns the tile id and the editor's outcome. A tile left without a save goes back
    from ``held`` to its earlier state (the draft, if any, is kept).
    """
    if gui is None:
        require_display()
    if tile_id is None:
        tile_id = next_tile(project, annotator)
    session = open_edit_session(project, tile_id, annotator, settle=settle)
    try:
        outcome = run_editor(
            session.state,
            backend=session.backend,
            schema=project.settings.classes,
            title=session.title,
            autosave_seconds=project.settings.editor.autosave_seconds,
            gui=gui,
        )
    finally:
        if project.store.tile(tile_id).held_by == annotator:
            project.store.release(tile_id, annotator)
    return tile_id, outcome
