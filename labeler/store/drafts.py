"""Drafts: an annotator's unsaved edit of a tile, kept across crashes and conflicts.

There is at most one draft per tile and annotator; each autosave replaces it, and a
save of the tile by the same annotator deletes it
(:meth:`labeler.store.annotations.AnnotationsMixin.save_annotation`). A draft is not an
annotation: it changes no tile state and never enters a training set.
"""

from __future__ import annotations

import numpy as np

from labeler.imagery.write import png_bytes
from labeler.store import schema as t
from labeler.store.base import as_utc, clock
from labeler.store.dialect import upsert
from labeler.store.images import ImagesMixin
from labeler.store.records import DraftRecord, decode_mask

__all__ = ["DraftsMixin"]


def _owner(tile_id: int, annotator_id: int):
    return (t.drafts.c.tile_id == tile_id) & (t.drafts.c.annotator_id == annotator_id)


class DraftsMixin(ImagesMixin):
    """Drafts of :class:`labeler.store.Store`."""

    def save_draft(
        self,
        tile_id: int,
        annotator: str,
        mask: np.ndarray,
        *,
        weak_label: np.ndarray | None = None,
        parent_version: int | None = None,
        seconds: float = 0.0,
        actions: int = 0,
    ) -> None:
        """Keep an unsaved edit, replacing this annotator's earlier draft of the tile.

        Parameters
        ----------
        tile_id : int
        annotator : str
            Name; created if new.
        mask : ndarray, shape (H, W), uint8
            The full mask being edited; must have the tile's shape.
        weak_label : ndarray, shape (H, W), uint8, optional
            The weak label (255 = not marked); must have the tile's shape.
        parent_version : int or None
            The version the edit was based on (the parent of its eventual save).
        seconds, actions : float, int
            Time spent and edit actions so far.

        Returns
        -------
        None

        Raises
        ------
        ValueError
            If ``mask`` or ``weak_label`` does not have the tile's shape.
        NotFoundError
            If the tile does not exist.
        """
        tile = self.tile(tile_id)
        for name, arr in (("mask", mask), ("weak_label", weak_label)):
            if arr is not None and np.asarray(arr).shape != tile.shape:
                raise ValueError(
                    f"{name}: expected shape {tile.shape} of tile {tile_id}, "
                    f"got {np.asarray(arr).shape}"
                )
        data = png_bytes(np.asarray(mask, np.uint8))
        sdata = None if weak_label is None else png_bytes(np.asarray(weak_label, np.uint8))
        with self._write() as conn:
            aid = self._annotator_id(conn, annotator)
            # one statement: two editors of the same annotator autosaving at once
            # leave the later draft and raise nothing
            upsert(
                conn,
                t.drafts,
                {
                    "tile_id": tile_id,
                    "annotator_id": aid,
                    "mask_png": data,
                    "scribble_png": sdata,
                    "parent_version": parent_version,
                    "seconds": float(seconds),
                    "actions": int(actions),
                    "saved_at": clock(conn),
                },
                keys=["tile_id", "annotator_id"],
            )

    def load_draft(self, tile_id: int, annotator: str) -> DraftRecord | None:
        """The draft of this tile and annotator.

        Parameters
        ----------
        tile_id : int
        annotator : str

        Returns
        -------
        DraftRecord or None
            None when there is no draft.

        Raises
        ------
        NotFoundError
            If the tile does not exist.
        ValueError
            If the stored draft is damaged (not a PNG, or not of the tile's shape).
        """
        tile = self.tile(tile_id)
        with self._read() as conn:
            aid = self._known_annotator_id(conn, annotator)
            if aid is None:
                return None
            r = conn.execute(t.drafts.select().where(_owner(tile_id, aid))).first()
        if r is None:
            return None
        what = f"draft of tile {tile_id} by {annotator}"
        return DraftRecord(
            tile_id=tile_id,
            annotator=annotator,
            parent_version=r.parent_version,
            seconds=float(r.seconds),
            actions=int(r.actions),
            saved_at=as_utc(r.saved_at),
            mask=decode_mask(r.mask_png, shape=tile.shape, what=what),
            weak_label=None
            if r.scribble_png is None
            else decode_mask(r.scribble_png, shape=tile.shape, what=what),
        )

    def discard_draft(self, tile_id: int, annotator: str) -> None:
        """Delete the draft of this tile and annotator, if any.

        Parameters
        ----------
        tile_id : int
        annotator : str

        Returns
        -------
        None
        """
        with self._write() as conn:
            aid = self._known_annotator_id(conn, annotator)
            if aid is not None:
                conn.execute(t.drafts.delete().where(_owner(tile_id, aid)))
