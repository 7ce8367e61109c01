"""Annotation saves: new versions of tile masks, checked for conflicts and life cycle.

Saves are single transactions. A save carries the version it was based on
(``parent_version``); a save based on a stale version raises
:class:`labeler.errors.ConflictError` and writes nothing. Versions are numbered per tile
(1, 2, ...); the unique constraint on (tile, version) makes two racing writers collide
instead of both landing, on SQLite and on PostgreSQL alike.

Which version is the parent a save must name (its lineage) is told by
:mod:`labeler.store.history`, which also reads saved versions back.

A save that changes the tile's state passes the life-cycle check
(:func:`labeler.store.holds.checked_move`) inside its transaction.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import sqlalchemy as sa
from sqlalchemy.exc import IntegrityError

from labeler.errors import ConflictError, LabelerError
from labeler.imagery.write import png_bytes
from labeler.states import (
    AMENDED,
    ANNOTATION_KINDS,
    ANNOTATION_STATES,
    IMPORTED,
    KIND_FULL,
    SETTLED,
    WEAK,
)
from labeler.store import schema as t
from labeler.store.base import now
from labeler.store.history import HistoryMixin, annotation_query, annotation_row, lineage_head_in
from labeler.store.holds import HoldsMixin, checked_move
from labeler.store.records import AnnotationRecord, TileRecord

__all__ = ["NewAnnotation", "AnnotationsMixin", "tile_state_after_save"]

#: Attempts of a save that lost a race for a version number before giving up.
_SAVE_RETRIES = 8


@dataclass(frozen=True)
class NewAnnotation:
    """One annotation to save (see :meth:`Store.save_annotation` for the fields)."""

    tile_id: int
    annotator: str
    mask: np.ndarray
    parent_version: int | None
    kind: str = KIND_FULL
    state: str = AMENDED
    seconds: float = 0.0
    actions: int = 0
    source: str = "editor"
    proposal_id: int | None = None
    tile_state: str | None = None


def tile_state_after_save(kind: str, state: str, tile_state: str | None = None) -> str | None:
    """The tile state a save asks for: None leaves the tile's state as it is.

    Parameters
    ----------
    kind : {KIND_FULL, KIND_WEAK}
        The annotation's kind: a full mask or a weak label (:mod:`labeler.states`).
    state : str
        The annotation's state (one of :data:`labeler.states.ANNOTATION_STATES`).
    tile_state : str, optional
        An explicit tile state given by the caller; returned as is.

    Returns
    -------
    str or None
        ``tile_state`` if given; else ``state`` for full masks (``amended`` for
        ``imported`` ones); None for weak labels and for ``weak`` full masks.
    """
    if tile_state is not None or kind != KIND_FULL:
        return tile_state
    return {IMPORTED: AMENDED, WEAK: None}.get(state, state)


def _conflict(
    conn: sa.Connection, tile_id: int, parent_version: int | None, head: int | None
) -> ConflictError:
    theirs = None
    if head is not None:
        other = conn.execute(
            annotation_query().where(
                (t.annotations.c.tile_id == tile_id) & (t.annotations.c.version == head)
            )
        ).first()
        theirs = None if other is None else annotation_row(other)
    return ConflictError(
        f"tile {tile_id}: this mask was based on version {parent_version}, "
        f"but version {head} was saved"
        + (f" by {theirs.annotator}" if theirs is not None else "")
        + " in the meantime; nothing was overwritten. Reopen the tile to see both masks.",
        tile_id=tile_id,
        parent_version=parent_version,
        current_version=head,
        theirs=theirs,
    )


class AnnotationsMixin(HistoryMixin, HoldsMixin):
    """Versioned annotation saves of :class:`labeler.store.Store`."""

    def _prepare(self, item: NewAnnotation) -> tuple[TileRecord, bytes, str | None]:
        """Check one save before any transaction; its tile, PNG bytes and asked state."""
        if item.kind not in ANNOTATION_KINDS:
            raise ValueError(f"kind: expected one of {ANNOTATION_KINDS}, got {item.kind!r}")
        if item.state not in ANNOTATION_STATES:
            raise ValueError(f"state: expected one of {ANNOTATION_STATES}, got {item.state!r}")
        tile = self.tile(item.tile_id)
        mask = np.asarray(item.mask)
        if mask.shape != tile.shape:
            raise ValueError(
                f"mask: expected shape {tile.shape} of tile {item.tile_id}, got {mask.shape}; "
                "save a mask of the whole tile"
            )
        self.schema.check_mask(mask, name="mask", allow_unlabelled=True)
        data = png_bytes(mask.astype(np.uint8, copy=False))
        return tile, data, tile_state_after_save(item.kind, item.state, item.tile_state)

    def _insert_annotation(
        self,
        conn: sa.Connection,
        item: NewAnnotation,
        tile: TileRecord,
        data: bytes,
        tile_state: str | None,
    ) -> int:
        """Write one checked save inside ``conn``'s transaction; the new row's id."""
        tile_id = item.tile_id
        parent_version = item.parent_version
        row = conn.execute(sa.select(t.tiles).where(t.tiles.c.id == tile_id)).one()
        aid = self._annotator_id(conn, item.annotator)
        head = lineage_head_in(conn, row, aid, settling=item.state == SETTLED)
        if head != parent_version:
            raise _conflict(conn, tile_id, parent_version, head)
        if tile_state is not None:
            try:
                checked_move(row.state, tile_state, tile_id=tile_id)
            except LabelerError as exc:
                raise LabelerError(f"{exc}; nothing was saved") from None
        top = conn.execute(
            sa.select(sa.func.max(t.annotations.c.version)).where(
                t.annotations.c.tile_id == tile_id
            )
        ).scalar()
        version = (top or 0) + 1
        stamp = now()
        res = conn.execute(
            t.annotations.insert().values(
                tile_id=tile_id,
                version=version,
                parent_version=parent_version,
                annotator_id=aid,
                kind=item.kind,
                state=item.state,
                mask_png=data,
                height=tile.height,
                width=tile.width,
                seconds=float(item.seconds),
                actions=int(item.actions),
                proposal_id=item.proposal_id,
                source=item.source,
                created_at=stamp,
            )
        )
        values: dict[str, object] = {"updated_at": stamp}
        if tile_state is not None:
            values["state"] = tile_state
        if row.held_by == aid:
            values["held_by"] = None
        conn.execute(t.tiles.update().where(t.tiles.c.id == tile_id).values(**values))
        self._assign(conn, tile_id, aid)
        conn.execute(
            t.drafts.delete().where(
                (t.drafts.c.tile_id == tile_id) & (t.drafts.c.annotator_id == aid)
            )
        )
        self._event(
            conn,
            "save",
            tile_id=tile_id,
            annotator_id=aid,
            detail={
                "version": version,
                "parent": parent_version,
                "kind": item.kind,
                "state": item.state,
                "from": row.state,
                "to": tile_state or row.state,
                "source": item.source,
            },
        )
        return int(res.inserted_primary_key[0])

    def _write_annotations(self, items: Sequence[NewAnnotation]) -> list[AnnotationRecord]:
        prepared = [(item, *self._prepare(item)) for item in items]
        for attempt in range(_SAVE_RETRIES):
            try:
                with self._write() as conn:
                    ids = [self._insert_annotation(conn, *p) for p in prepared]
                    rows = conn.execute(annotation_query().where(t.annotations.c.id.in_(ids))).all()
                by_id = {r.id: annotation_row(r) for r in rows}
                return [by_id[i] for i in ids]
            except IntegrityError:
                # another writer took a version number between our read and insert;
                # re-read: if our parent is now stale the lineage check raises ConflictError
                if attempt == _SAVE_RETRIES - 1:
                    raise
        raise AssertionError("unreachable")  # pragma: no cover

    def save_annotation(
        self,
        tile_id: int,
        annotator: str,
        mask: np.ndarray,
        *,
        parent_version: int | None,
        kind: str = KIND_FULL,
        state: str = AMENDED,
        seconds: float = 0.0,
        actions: int = 0,
        source: str = "editor",
        proposal_id: int | None = None,
        tile_state: str | None = None,
    ) -> AnnotationRecord:
        """Save a new annotation version of a tile (one transaction).

        The save also clears the annotator's draft of the tile and their hold on it,
        and records that the tile was handed to them.

        Parameters
        ----------
        tile_id : int
        annotator : str
            Name; created if new.
        mask : ndarray, shape (H, W), uint8
            Class indices (255 = unlabelled); must have the tile's shape.
        parent_version : int or None
            The version this mask was based on: the newest version of the tile's
            lineage (None when the lineage has no saved version yet).
        kind : {KIND_FULL, KIND_WEAK}
            A full mask or a weak label (:mod:`labeler.states`).
        state : {"accepted", "amended", "settled", "imported", "weak"}
            What the annotation records (decided by the workflow).
        seconds, actions : float, int
            Time spent and edit actions, for effort statistics.
        source : str
            Where the save came from ("editor", "queue", "import", ...).
        proposal_id : int, optional
            The proposal the annotator started from.
        tile_state : str, optional
            Tile state after the save (default: see :func:`tile_state_after_save`:
            ``state`` for full masks, unchanged for weak labels; ``imported`` full masks
            leave the tile ``amended``). Checked against the life cycle.

        Returns
        -------
        AnnotationRecord
            The saved row (its ``version`` is the parent of the next save).

        Raises
        ------
        ConflictError
            If ``parent_version`` is not the lineage's newest version (someone saved
            first). Nothing is written.
        LabelerError
            If the life cycle does not allow the tile's move to the new state (for
            example a plain save on a ``contested`` tile, which a reviewer settles).
            Nothing is written.
        ValueError
            If the mask has the wrong shape, dtype or values, or ``kind``/``state``
            is unknown.
        NotFoundError
            If the tile does not exist.
        """
        item = NewAnnotation(
            tile_id=tile_id,
            annotator=annotator,
            mask=mask,
            parent_version=parent_version,
            kind=kind,
            state=state,
            seconds=seconds,
            actions=actions,
            source=source,
            proposal_id=proposal_id,
            tile_state=tile_state,
        )
        return self._write_annotations([item])[0]

    def save_annotations(self, items: Sequence[NewAnnotation]) -> list[AnnotationRecord]:
        """Save several annotations in ONE transaction: all land or none does.

        Used by imports, where a file covering many tiles must not land half-way.
        Every item is checked as in :meth:`save_annotation` before anything is written.

        Parameters
        ----------
        items : sequence of NewAnnotation

        Returns
        -------
        list of AnnotationRecord
            One per item, in the items' order (empty for no items).

        Raises
        ------
        ConflictError, LabelerError, ValueError, NotFoundError
            As :meth:`save_annotation`, for the first item that fails; nothing is written.
        """
        if not items:
            return []
        return self._write_annotations(items)
