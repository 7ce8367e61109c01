"""Learning on one tile in the editor: the newest head re-fitted on the annotator's marks.

The editor (torch-free) asks its backend for a new proposal of the tile from the marks it
holds (:meth:`labeler.workflow.editing.StoreBackend.relearn`); the backend gets a
:class:`TileRelearner` from :func:`tile_relearner`, which brings together what the model
room needs: the newest trained head (its checkpoint), the tile's cached encoder features
(computed and cached once if missing) and the tile's pixels. The re-fit itself is
:class:`labeler.model.ontile.TileLearner`. Nothing is stored: the marks reach the store
when the annotator saves (the full mask, or the weak label alone), and the next
``labeler retrain`` learns from them.
"""

from __future__ import annotations

import numpy as np

from labeler.errors import LabelerError
from labeler.imagery.read import open_image
from labeler.project import Project
from labeler.store.records import ModelVersionRecord
from labeler.workflow.features import (
    encoder_and_cache,
    head_encoder,
    read_checkpoint,
    tile_features,
)

__all__ = ["newest_head", "TileRelearner", "tile_relearner"]


def newest_head(project: Project, *, encoder_version: str):
    """The newest trained head of the project, or None before the first retrain.

    Parameters
    ----------
    project : Project
        An open project.
    encoder_version : str
        The installed encoder's version; a head trained on another is refused.

    Returns
    -------
    (head, model_version) or None
        The loaded :class:`labeler.model.head.ProposalHead` and its model version row.

    Raises
    ------
    LabelerError
        If the checkpoint is missing or unreadable, or was trained on another encoder
        version (the message says to run ``labeler retrain``).
    """
    mv: ModelVersionRecord | None = project.store.latest_model_version(kind="head")
    if mv is None:
        return None
    head, meta, _ = read_checkpoint(project, mv)
    if meta.encoder_version != encoder_version:
        raise LabelerError(
            f"model {mv.name} was trained on encoder {meta.encoder_version}, the installed "
            f"encoder is {encoder_version}; run 'labeler retrain'"
        )
    return head, mv


class TileRelearner:
    """A tile's proposal re-fitted from marks: a callable ``marks -> mask``.

    Parameters
    ----------
    learner : labeler.model.ontile.TileLearner
        The model room's re-fit, set up for the tile.
    model : str
        Name of the model version it starts from.
    """

    def __init__(self, learner, *, model: str) -> None:
        self._learner = learner
        self.model = model

    def __call__(self, marks: np.ndarray) -> np.ndarray:
        """The tile's new proposal (H, W) uint8 from ``marks`` (class index where marked,
        255 elsewhere)."""
        return self._learner.fit(np.asarray(marks, np.uint8))


def tile_relearner(project: Project, tile_id: int) -> TileRelearner | None:
    """The on-tile re-fit of ``tile_id`` with the newest head, or None without a head.

    The tile's features come from the encoder version the head was trained on.

    Parameters
    ----------
    project : Project
        An open project.
    tile_id : int
        The tile in the editor.

    Returns
    -------
    TileRelearner or None

    Raises
    ------
    LabelerError
        As :func:`newest_head`.
    """
    latest = project.store.latest_model_version(kind="head")
    if latest is None:
        return None
    # the head's own encoder version, as propose reads it: a newer adapted encoder
    # (labeler adapt) or a head trained with --encoder on an older one still works here
    encoder, cache = encoder_and_cache(
        project, encoder=head_encoder(latest), unknown_is_default=True
    )
    found = newest_head(project, encoder_version=encoder.version)
    if found is None:
        return None
    head, mv = found
    from labeler.model.ontile import TileLearner

    store = project.store
    tile = store.tile(tile_id)
    image = store.image(tile.image_id)
    with open_image(project.image_path(image)) as reader:
        (features,) = tile_features(cache, encoder, reader, image, [tile])
        pixels = reader.read(tile.window)
    return TileRelearner(TileLearner(head, features, image=pixels), model=mv.name)
