"""Annotation history and lineage: reading saved versions, and who may see which.

Versions are numbered per tile (1, 2, ...). On an ordinary tile the newest version of
the tile is the parent the next save must name. On an *overlap* tile (given to several
annotators for agreement) each annotator has an own lineage until a reviewer settles
the tile, so independent first saves do not conflict, and nobody sees another's mask
before saving (:meth:`HistoryMixin.visible_annotation`).
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from datetime import datetime

import sqlalchemy as sa

from labeler.errors import NotFoundError
from labeler.states import KIND_FULL, SETTLED
from labeler.store import schema as t
from labeler.store.base import as_utc
from labeler.store.images import ImagesMixin, _tile_query, _tile_row
from labeler.store.records import AnnotationRecord, TileWork

__all__ = ["HistoryMixin", "annotation_query", "annotation_row", "lineage_head_in"]


def annotation_query() -> sa.Select:
    """The query of annotation rows joined with their annotator's name.

    Returns
    -------
    sqlalchemy.Select
        Every column of ``annotations`` plus ``annotator`` (the name); callers add their
        ``where`` and ``order_by``.
    """
    return sa.select(t.annotations, t.annotators.c.name.label("annotator")).select_from(
        t.annotations.join(t.annotators, t.annotations.c.annotator_id == t.annotators.c.id)
    )


def annotation_row(r: sa.Row) -> AnnotationRecord:
    """The record of one row of :func:`annotation_query`.

    Parameters
    ----------
    r : sqlalchemy.Row
        A row of :func:`annotation_query`.

    Returns
    -------
    AnnotationRecord
    """
    return AnnotationRecord(
        id=r.id,
        tile_id=r.tile_id,
        version=r.version,
        parent_version=r.parent_version,
        annotator=r.annotator,
        kind=r.kind,
        state=r.state,
        height=r.height,
        width=r.width,
        seconds=float(r.seconds),
        actions=int(r.actions),
        source=r.source,
        proposal_id=r.proposal_id,
        created_at=as_utc(r.created_at),
        mask_png=r.mask_png,
    )


def lineage_head_in(
    conn: sa.Connection, tile: sa.Row, annotator_id: int, *, settling: bool
) -> int | None:
    """The newest version a save must be based on, read inside ``conn``.

    On an overlap tile that is not settled, only the annotator's own versions count unless
    ``settling`` (a reviewer's save).

    Parameters
    ----------
    conn : sqlalchemy.Connection
        The save's transaction.
    tile : sqlalchemy.Row
        The tile's row of ``tiles``.
    annotator_id : int
        The saver's id.
    settling : bool
        True for a reviewer settling a contested tile.

    Returns
    -------
    int or None
        The version; None when the lineage has no saved version yet.
    """
    q = sa.select(sa.func.max(t.annotations.c.version)).where(t.annotations.c.tile_id == tile.id)
    if tile.overlap and not settling and tile.state != SETTLED:
        q = q.where(t.annotations.c.annotator_id == annotator_id)
    return conn.execute(q).scalar()


class HistoryMixin(ImagesMixin):
    """Annotation history and lineage of :class:`labeler.store.Store`."""

    def annotation_history(self, tile_id: int) -> list[AnnotationRecord]:
        """Every saved version of a tile (all annotators and kinds).

        Parameters
        ----------
        tile_id : int

        Returns
        -------
        list of AnnotationRecord
            Oldest version first.
        """
        with self._read() as conn:
            q = (
                annotation_query()
                .where(t.annotations.c.tile_id == tile_id)
                .order_by(t.annotations.c.version)
            )
            return [annotation_row(r) for r in conn.execute(q)]

    def latest_annotation(
        self, tile_id: int, *, annotator: str | None = None, kind: str | None = KIND_FULL
    ) -> AnnotationRecord | None:
        """The newest annotation of a tile, of one annotator and/or kind.

        Parameters
        ----------
        tile_id : int
        annotator : str, optional
            Only this annotator's saves.
        kind : {KIND_FULL, KIND_WEAK} or None
            Only saves of this kind; None for any.

        Returns
        -------
        AnnotationRecord or None
            None when no save matches.
        """
        q = annotation_query().where(t.annotations.c.tile_id == tile_id)
        if annotator is not None:
            q = q.where(t.annotators.c.name == annotator)
        if kind is not None:
            q = q.where(t.annotations.c.kind == kind)
        with self._read() as conn:
            r = conn.execute(q.order_by(t.annotations.c.version.desc()).limit(1)).first()
        return None if r is None else annotation_row(r)

    def lineage_head(self, tile_id: int, annotator: str, *, settling: bool = False) -> int | None:
        """The version a save by ``annotator`` must name as its parent now.

        Parameters
        ----------
        tile_id : int
        annotator : str
            May be a name the store has not seen yet.
        settling : bool
            A reviewer's settling save: on an overlap tile it follows the tile's newest
            version, not the reviewer's own lineage.

        Returns
        -------
        int or None
            None when the lineage has no saved version yet.

        Raises
        ------
        NotFoundError
            If the tile does not exist.
        """
        with self._read() as conn:
            row = conn.execute(sa.select(t.tiles).where(t.tiles.c.id == tile_id)).first()
            if row is None:
                raise NotFoundError(f"tile {tile_id} is not in this project")
            aid = self._known_annotator_id(conn, annotator)
            return lineage_head_in(conn, row, -1 if aid is None else aid, settling=settling)

    def annotations_at(
        self, versions: Sequence[tuple[int, int]]
    ) -> dict[tuple[int, int], AnnotationRecord]:
        """The saved versions named by ``(tile_id, version)`` pairs, in few queries.

        Parameters
        ----------
        versions : sequence of (int, int)
            Tile ids and version numbers.

        Returns
        -------
        dict of (int, int) to AnnotationRecord
            The versions found (a pair that names no saved version is left out).
        """
        out: dict[tuple[int, int], AnnotationRecord] = {}
        pairs = sorted(set(versions))
        with self._read() as conn:
            for k in range(0, len(pairs), 500):
                chunk = pairs[k : k + 500]
                key = sa.tuple_(t.annotations.c.tile_id, t.annotations.c.version)
                for r in conn.execute(annotation_query().where(key.in_(chunk))):
                    out[(r.tile_id, r.version)] = annotation_row(r)
        return out

    def visible_annotation(self, tile_id: int, annotator: str) -> AnnotationRecord | None:
        """The newest full mask ``annotator`` may see on the tile.

        On an overlap tile that is not settled, an annotator sees only their own masks,
        never another's, so that agreement figures stay independent. Elsewhere the
        tile's newest full mask is visible.

        Parameters
        ----------
        tile_id : int
        annotator : str

        Returns
        -------
        AnnotationRecord or None
            None when there is no mask this annotator may see.
        """
        tile = self.tile(tile_id)
        if tile.overlap and tile.state != SETTLED:
            return self.latest_annotation(tile_id, annotator=annotator)
        return self.latest_annotation(tile_id)

    def annotations(
        self,
        *,
        since: datetime | None = None,
        kind: str | None = KIND_FULL,
        tile_ids: Iterable[int] | None = None,
    ) -> list[AnnotationRecord]:
        """Annotation rows (every version), filtered by time, kind and tiles.

        Parameters
        ----------
        since : datetime, optional
            Only rows saved at or after this time (timezone-aware).
        kind : {KIND_FULL, KIND_WEAK} or None
            Only rows of this kind; None for any.
        tile_ids : iterable of int, optional
            Only rows of these tiles.

        Returns
        -------
        list of AnnotationRecord
            Oldest first.
        """
        q = annotation_query()
        if kind is not None:
            q = q.where(t.annotations.c.kind == kind)
        if tile_ids is not None:
            q = q.where(t.annotations.c.tile_id.in_(list(tile_ids)))
        with self._read() as conn:
            rows = [annotation_row(r) for r in conn.execute(q.order_by(t.annotations.c.id))]
        if since is not None:
            rows = [a for a in rows if a.created_at >= since]
        return rows

    def tile_work(self, annotator: str, *, image_id: int | None = None) -> list[TileWork]:
        """What is saved on each tile, as ``annotator``'s next save sees it (no masks read).

        For each tile: the version ``annotator``'s next save must name as its parent
        (the same rule as :meth:`lineage_head`), who saved that version, and who saved
        the tile's newest full mask and newest weak label. The annotations are read
        before the tiles, so a tile's state is never older than its versions; a save
        that lands after this call moves a lineage past the ``head`` given here, which
        the save's own version check then notices.

        Parameters
        ----------
        annotator : str
            Whose next save; may be a name the store has not seen yet.
        image_id : int, optional
            Only the tiles of this image.

        Returns
        -------
        list of TileWork
            In tile id order.
        """
        q = (
            sa.select(
                t.annotations.c.tile_id,
                t.annotations.c.version,
                t.annotations.c.annotator_id,
                t.annotations.c.kind,
                t.annotators.c.name,
            )
            .select_from(
                t.annotations.join(t.annotators, t.annotations.c.annotator_id == t.annotators.c.id)
            )
            .order_by(t.annotations.c.tile_id, t.annotations.c.version)
        )
        tq = _tile_query().order_by(t.tiles.c.id)
        if image_id is not None:
            q = q.join(t.tiles, t.annotations.c.tile_id == t.tiles.c.id).where(
                t.tiles.c.image_id == image_id
            )
            tq = tq.where(t.tiles.c.image_id == image_id)
        with self._read() as conn:
            me = self._known_annotator_id(conn, annotator)
            saved: dict[int, list[sa.Row]] = {}
            for r in conn.execute(q):
                saved.setdefault(r.tile_id, []).append(r)  # oldest version first
            tiles = [_tile_row(r) for r in conn.execute(tq)]
        out = []
        for tile in tiles:
            rows = saved.get(tile.id, [])
            lineage = rows
            if tile.overlap and tile.state != SETTLED:  # as lineage_head_in, not settling
                lineage = [r for r in rows if r.annotator_id == me]
            head = lineage[-1] if lineage else None
            full = [r for r in rows if r.kind == "full"]
            weak = [r for r in rows if r.kind != "full"]
            out.append(
                TileWork(
                    tile=tile,
                    head=None if head is None else int(head.version),
                    head_by=None if head is None else head.name,
                    head_kind=None if head is None else head.kind,
                    full_by=full[-1].name if full else None,
                    weak_by=weak[-1].name if weak else None,
                )
            )
        return out
