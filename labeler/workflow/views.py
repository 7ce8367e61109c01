"""Read-only views of a project for the edges: the terminal queue, the CLI and the demo.

The edges never open the store themselves; what they show comes from here (or from the
result of a stage). Nothing here changes the project.

* :func:`annotators`, :func:`model_versions`: lists for filters and the model screen;
* :func:`tile_view`: a tile's pixels with the mask its annotator may see (on an overlap
  tile an annotator never sees another annotator's mask, so that agreement figures stay
  independent), for the queue's preview;
* :func:`tile_places`: where each tile lies (image, window, overlap, state);
* :func:`save_basis`: what a save by an annotator builds on (the version it replaces and
  the newest proposal), for a simulated annotator that saves through
  :func:`labeler.workflow.annotating.save_tile_mask` as the editor does.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from labeler.imagery.read import open_image
from labeler.imagery.tiling import Window
from labeler.project import Project
from labeler.store.records import ModelVersionRecord
from labeler.workflow.naming import model_labels

__all__ = [
    "ModelVersionRecord",
    "annotators",
    "model_versions",
    "TileView",
    "tile_view",
    "TilePlace",
    "tile_places",
    "SaveBasis",
    "save_basis",
    "holders",
]


def holders(project: Project) -> dict[int, str]:
    """Who holds which tile now (one light read, for a view that refreshes itself).

    Parameters
    ----------
    project : Project
        The open project.

    Returns
    -------
    dict of int to str
        Tile id -> the annotator holding it; tiles nobody holds are absent. A hold
        whose lease lapsed stays listed until tiles are next handed out.
    """
    return {tile_id: who for tile_id, who, _left in project.store.current_holds()}


def annotators(project: Project) -> list[str]:
    """Names of every annotator the project knows, in order of first appearance.

    Parameters
    ----------
    project : Project
        An open project.

    Returns
    -------
    list of str
    """
    return project.store.annotators()


def model_versions(project: Project) -> list[ModelVersionRecord]:
    """Every model version (cold starts and trained heads), oldest first.

    Parameters
    ----------
    project : Project
        An open project.

    Returns
    -------
    list of ModelVersionRecord
    """
    return project.store.model_versions()


@dataclass(frozen=True)
class TileView:
    """A tile as an annotator may see it.

    Attributes
    ----------
    tile_id : int
    image : str
        Name of the tile's image.
    row, col : int
        Top-left pixel of the tile in its image.
    rgb : ndarray, shape (H, W, 3), uint8
        The tile's pixels.
    mask : ndarray, shape (H, W), uint8, or None
        The mask shown: the newest saved mask the annotator may see, else the newest
        proposal, else None.
    shows : {"saved", "proposal", "nothing"}
        Which of those ``mask`` is.
    saved_by, saved_state : str or None
        Annotator and state of the saved mask shown.
    saved_version : int or None
        Its version in the tile's history.
    model : str or None
        Name of the model version whose proposal is shown.
    """

    tile_id: int
    image: str
    row: int
    col: int
    rgb: np.ndarray
    mask: np.ndarray | None
    shows: str
    saved_by: str | None = None
    saved_version: int | None = None
    saved_state: str | None = None
    model: str | None = None


def tile_view(project: Project, tile_id: int, *, annotator: str) -> TileView:
    """The tile's pixels with the mask ``annotator`` may see.

    Parameters
    ----------
    project : Project
        An open project.
    tile_id : int
        The tile.
    annotator : str
        Who looks; on an overlap tile that is not settled only their own mask is shown.

    Returns
    -------
    TileView

    Raises
    ------
    labeler.errors.NotFoundError
        If the tile does not exist.
    labeler.errors.InputError
        If the image file cannot be read.
    """
    store = project.store
    tile = store.tile(tile_id)
    image = store.image(tile.image_id)
    with open_image(project.image_path(image)) as reader:
        rgb = reader.read(tile.window)
    place = dict(tile_id=tile_id, image=image.name, row=tile.row, col=tile.col, rgb=rgb)
    saved = store.visible_annotation(tile_id, annotator)
    if saved is not None:
        return TileView(
            **place,
            mask=saved.mask(),
            shows="saved",
            saved_by=saved.annotator,
            saved_version=saved.version,
            saved_state=saved.state,
        )
    proposal = store.latest_proposal(tile_id)
    if proposal is not None:
        names = model_labels(store.model_versions())
        return TileView(
            **place,
            mask=proposal.mask(),
            shows="proposal",
            model=names.get(proposal.model_version_id),
        )
    return TileView(**place, mask=None, shows="nothing")


@dataclass(frozen=True)
class TilePlace:
    """Where a tile lies and what state it is in.

    Attributes
    ----------
    tile_id : int
    image : str
        Name of the tile's image.
    window : Window
        The tile's pixels in its image (row/column order).
    overlap : bool
        Whether the tile is given to several annotators (agreement is measured on it).
    state : str
        Its life-cycle state.
    """

    tile_id: int
    image: str
    window: Window
    overlap: bool
    state: str


def tile_places(project: Project) -> dict[int, TilePlace]:
    """Every tile's place, by tile id.

    Parameters
    ----------
    project : Project
        An open project.

    Returns
    -------
    dict of int to TilePlace
        In tile id order.
    """
    store = project.store
    names = {im.id: im.name for im in store.images()}
    return {
        t.id: TilePlace(
            tile_id=t.id, image=names[t.image_id], window=t.window, overlap=t.overlap, state=t.state
        )
        for t in store.tiles()
    }


@dataclass(frozen=True)
class SaveBasis:
    """What a save by one annotator on one tile builds on.

    Attributes
    ----------
    parent_version : int or None
        The version the save replaces (the annotator's lineage head); a save naming an
        older one is refused as a conflict.
    proposal_id : int or None
        The tile's newest proposal; a full mask equal to it is saved as accepted.
    """

    parent_version: int | None
    proposal_id: int | None


def save_basis(project: Project, tile_id: int, annotator: str) -> SaveBasis:
    """What a save of ``tile_id`` by ``annotator`` must name now.

    Parameters
    ----------
    project : Project
        An open project.
    tile_id : int
        The tile.
    annotator : str
        Who saves.

    Returns
    -------
    SaveBasis

    Raises
    ------
    labeler.errors.NotFoundError
        If the tile does not exist.
    """
    store = project.store
    proposal = store.latest_proposal(tile_id)
    return SaveBasis(
        parent_version=store.lineage_head(tile_id, annotator),
        proposal_id=None if proposal is None else proposal.id,
    )
