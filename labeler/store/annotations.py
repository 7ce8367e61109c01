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

Saves come one at a time (:meth:`AnnotationsMixin.save_annotation`), as a batch that
lands whole or not at all (:meth:`AnnotationsMixin.save_annotations`), or as a batch
that saves every item whose tile is still as its parent version says and reports the
others (:meth:`AnnotationsMixin.save_if_unchanged`, used by imports).
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from dataclasses import dataclass, replace

import numpy as np
import sqlalchemy as sa
from sqlalchemy.exc import IntegrityError, OperationalError

from labeler.errors import ConflictError, LabelerError
from labeler.imagery.write import png_bytes
from labeler.states import (
    AMENDED,
    ANNOTATION_KINDS,
    ANNOTATION_STATES,
    KIND_FULL,
    SETTLED,
    WEAK,
)
from labeler.store import schema as t
from labeler.store.base import clock
from labeler.store.dialect import is_retryable
from labeler.store.history import HistoryMixin, annotation_query, annotation_row
from labeler.store.holds import HoldsMixin, checked_move
from labeler.store.records import AnnotationRecord, SaveOutcome, TileRecord

__all__ = ["NewAnnotation", "AnnotationsMixin", "tile_state_after_save"]

#: Attempts of a save that lost a race for a version number before giving up.
_SAVE_RETRIES = 8
#: Tile ids per IN list (well under the parameter limits of SQLite and PostgreSQL).
_CHUNK = 500


def _chunks(ids: Sequence[int]) -> list[Sequence[int]]:
    return [ids[k : k + _CHUNK] for k in range(0, len(ids), _CHUNK)]


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
        ``tile_state`` if given; else ``state`` for full masks (an ``imported`` full
        mask leaves the tile ``imported``); None for weak labels and
        for ``weak`` full masks.
    """
    if tile_state is not None or kind != KIND_FULL:
        return tile_state
    return None if state == WEAK else state


class _RefusedMove(LabelerError):
    """The life cycle does not allow the state a save asks for (nothing was saved)."""


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

    def _prepare(
        self, item: NewAnnotation, tile: TileRecord | None = None
    ) -> tuple[TileRecord, bytes, str | None]:
        """Check one save before any transaction; its tile, PNG bytes and asked state."""
        if item.kind not in ANNOTATION_KINDS:
            raise ValueError(f"kind: expected one of {ANNOTATION_KINDS}, got {item.kind!r}")
        if item.state not in ANNOTATION_STATES:
            raise ValueError(f"state: expected one of {ANNOTATION_STATES}, got {item.state!r}")
        if tile is None:
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

    def _insert_saves(
        self,
        conn: sa.Connection,
        prepared: Sequence[tuple[NewAnnotation, TileRecord, bytes, str | None]],
        *,
        skip_changed: bool,
    ) -> list[tuple[int | None, str | None]]:
        """Write checked saves inside ``conn``'s transaction, in order.

        Each save names its parent version; it is written when that is still its
        lineage's newest version (the rule of
        :func:`labeler.store.history.lineage_head_in`, counting the saves
        of this batch written before it) and the life cycle allows the tile's move.
        Statements go per chunk of tiles, not per save, so that a batch of thousands of
        tiles holds the write lock briefly.

        Returns
        -------
        list of (version, problem)
            Per save: the version written and None, or None and why nothing was
            written (only with ``skip_changed``).

        Raises
        ------
        ConflictError, LabelerError
            Without ``skip_changed``: for the first stale parent or refused move (the
            caller's transaction then rolls back).
        """
        aids: dict[str, int] = {}
        for item, *_ in prepared:
            if item.annotator not in aids:
                aids[item.annotator] = self._annotator_id(conn, item.annotator)
        tile_ids = sorted({item.tile_id for item, *_ in prepared})
        rows: dict[int, sa.Row] = {}
        top: dict[int, int] = {}  # newest version of each tile
        own: dict[tuple[int, int], int] = {}  # newest version of each (tile, annotator)
        for chunk in _chunks(tile_ids):
            # lock the tiles (in id order, so two batches cannot deadlock) until the
            # transaction ends: a second writer of a tile waits here, then reads the
            # versions this one wrote (PostgreSQL; SQLite's writers are serialised)
            tiles = conn.execute(
                sa.select(t.tiles)
                .where(t.tiles.c.id.in_(chunk))
                .order_by(t.tiles.c.id)
                .with_for_update()
            )
            rows.update((r.id, r) for r in tiles)
            newest = (
                sa.select(
                    t.annotations.c.tile_id,
                    t.annotations.c.annotator_id,
                    sa.func.max(t.annotations.c.version),
                )
                .where(t.annotations.c.tile_id.in_(chunk))
                .group_by(t.annotations.c.tile_id, t.annotations.c.annotator_id)
            )
            for tid, aid, version in conn.execute(newest):
                own[(tid, aid)] = version
                top[tid] = max(top.get(tid, 0), version)
        state = {tid: r.state for tid, r in rows.items()}
        held = {tid: r.held_by for tid, r in rows.items()}
        stamp = clock(conn)
        inserts: list[dict] = []
        events: list[dict] = []
        updates: dict[int, dict[str, object]] = {}
        outcomes: list[tuple[int | None, str | None]] = []
        for item, tile, data, tile_state in prepared:
            tid, aid = item.tile_id, aids[item.annotator]
            row = rows[tid]
            if row.overlap and item.state != SETTLED and state[tid] != SETTLED:
                head = own.get((tid, aid))  # an annotator's own lineage (lineage_head_in)
            else:
                head = top.get(tid)
            if head != item.parent_version:
                conflict = _conflict(conn, tid, item.parent_version, head)
                if not skip_changed:
                    raise conflict
                outcomes.append((None, str(conflict)))
                continue
            if tile_state is not None:
                try:
                    checked_move(state[tid], tile_state, tile_id=tid)
                except LabelerError as exc:
                    refused = _RefusedMove(f"{exc}; nothing was saved")
                    if not skip_changed:
                        raise refused from None
                    outcomes.append((None, str(refused)))
                    continue
            version = top.get(tid, 0) + 1
            top[tid] = own[(tid, aid)] = version
            inserts.append(
                {
                    "tile_id": tid,
                    "version": version,
                    "parent_version": item.parent_version,
                    "annotator_id": aid,
                    "kind": item.kind,
                    "state": item.state,
                    "mask_png": data,
                    "height": tile.height,
                    "width": tile.width,
                    "seconds": float(item.seconds),
                    "actions": int(item.actions),
                    "proposal_id": item.proposal_id,
                    "source": item.source,
                    "created_at": stamp,
                }
            )
            before = state[tid]
            values = updates.setdefault(tid, {"updated_at": stamp})
            if tile_state is not None:
                values["state"] = state[tid] = tile_state
            if held[tid] == aid:
                values["held_by"] = held[tid] = None
            events.append(
                {
                    "at": stamp,
                    "kind": "save",
                    "tile_id": tid,
                    "annotator_id": aid,
                    "detail": {
                        "version": version,
                        "parent": item.parent_version,
                        "kind": item.kind,
                        "state": item.state,
                        "from": before,
                        "to": tile_state or before,
                        "source": item.source,
                    },
                }
            )
            outcomes.append((version, None))
        if not inserts:
            return outcomes
        conn.execute(t.annotations.insert(), inserts)
        same: dict[tuple, list[int]] = {}
        for tid, values in updates.items():
            same.setdefault(tuple(sorted(values.items())), []).append(tid)
        for values, tids in same.items():
            for chunk in _chunks(tids):
                conn.execute(t.tiles.update().where(t.tiles.c.id.in_(chunk)).values(**dict(values)))
        saved: dict[int, set[int]] = {}
        for row in inserts:
            saved.setdefault(row["annotator_id"], set()).add(row["tile_id"])
        for aid, tids in saved.items():
            for chunk in _chunks(sorted(tids)):
                handed = set(
                    conn.execute(
                        sa.select(t.assignments.c.tile_id).where(
                            (t.assignments.c.annotator_id == aid)
                            & t.assignments.c.tile_id.in_(chunk)
                        )
                    ).scalars()
                )
                new = [
                    {"tile_id": tid, "annotator_id": aid, "assigned_at": stamp}
                    for tid in chunk
                    if tid not in handed
                ]
                if new:
                    conn.execute(t.assignments.insert(), new)
                conn.execute(
                    t.drafts.delete().where(
                        t.drafts.c.tile_id.in_(chunk) & (t.drafts.c.annotator_id == aid)
                    )
                )
        conn.execute(t.events.insert(), events)
        return outcomes

    def _write_annotations(self, items: Sequence[NewAnnotation]) -> list[AnnotationRecord]:
        prepared = [(item, *self._prepare(item)) for item in items]
        for attempt in range(_SAVE_RETRIES):
            try:
                with self._write() as conn:
                    written = self._insert_saves(conn, prepared, skip_changed=False)
                    out = []
                    for (item, *_), (version, _) in zip(prepared, written, strict=True):
                        row = conn.execute(
                            annotation_query().where(
                                (t.annotations.c.tile_id == item.tile_id)
                                & (t.annotations.c.version == version)
                            )
                        ).one()
                        out.append(annotation_row(row))
                return out
            except (IntegrityError, OperationalError) as exc:
                # another writer took a version number between our read and insert, or
                # the server broke a deadlock; re-read: if our parent is now stale the
                # lineage check raises ConflictError
                if isinstance(exc, OperationalError) and not is_retryable(exc):
                    raise
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
            ``state`` for full masks, unchanged for weak labels). Checked against the
            life cycle.

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

        For a batch that must land whole (a conflict on any tile refuses all of it);
        imports use :meth:`save_if_unchanged`, which saves the tiles still unchanged.
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

    def save_if_unchanged(self, items: Iterable[NewAnnotation]) -> list[SaveOutcome]:
        """Save every item whose tile is unchanged since its parent version, in ONE transaction.

        An item whose lineage moved past its ``parent_version`` (someone saved the tile
        since), or whose tile is now in a state the life cycle does not leave for this
        save (e.g. found ``contested`` meanwhile), is not saved and is reported; every
        other item is saved. The items that are saved land together or not at all (a
        kill leaves none of them). Used by imports, where one tile changed by someone
        else must neither be overwritten nor stop the rest.

        Parameters
        ----------
        items : iterable of NewAnnotation
            May be a generator: the items are taken one at a time, each mask checked
            and encoded as it comes (only its PNG bytes are kept), all before the write
            transaction opens, so memory holds one mask at a time and an error raised
            by the generator saves nothing.

        Returns
        -------
        list of SaveOutcome
            One per item, in the items' order.

        Raises
        ------
        ValueError, NotFoundError
            As :meth:`save_annotation`, for the first item with a bad mask, kind or
            state or an unknown tile; nothing is written.
        """
        prepared = []
        known: dict[int, TileRecord] = {}  # the tiles of every image met so far
        for item in items:
            if item.tile_id not in known:
                image_id = self.tile(item.tile_id).image_id
                known.update((x.id, x) for x in self.tiles(image_id=image_id))
            tile, data, tile_state = self._prepare(item, known[item.tile_id])
            prepared.append((replace(item, mask=None), tile, data, tile_state))
        if not prepared:
            return []
        for attempt in range(_SAVE_RETRIES):
            try:
                with self._write() as conn:
                    written = self._insert_saves(conn, prepared, skip_changed=True)
                return [
                    SaveOutcome(item.tile_id, version, problem)
                    for (item, *_), (version, problem) in zip(prepared, written, strict=True)
                ]
            except (IntegrityError, OperationalError) as exc:
                # a deadlock the server broke (the tile locks make version races rare);
                # re-read: a stale parent is reported
                if isinstance(exc, OperationalError) and not is_retryable(exc):
                    raise
                if attempt == _SAVE_RETRIES - 1:
                    raise
        raise AssertionError("unreachable")  # pragma: no cover
