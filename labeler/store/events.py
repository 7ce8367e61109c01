"""The event log and the figures counted from the store.

The event log only ever gets new rows: every save, hold, state move, proposal batch,
pick and model version appends one (inside the same transaction as the change, see
:meth:`labeler.store.base.StoreBase._event`). The counts here are what the status and
effort screens show.
"""

from __future__ import annotations

from datetime import datetime

import sqlalchemy as sa

from labeler.states import KIND_FULL, STATES
from labeler.store import schema as t
from labeler.store.base import StoreBase, as_utc
from labeler.store.records import EventRecord

__all__ = ["EventsMixin"]


class EventsMixin(StoreBase):
    """Event log and statistics of :class:`labeler.store.Store`."""

    def log_event(
        self,
        kind: str,
        *,
        tile_id: int | None = None,
        annotator: str | None = None,
        detail: dict | None = None,
    ) -> None:
        """Append one row to the event log (its own transaction).

        Parameters
        ----------
        kind : str
            What happened (e.g. ``"import"``, ``"export"``).
        tile_id : int, optional
            The tile concerned.
        annotator : str, optional
            Who did it (created if new).
        detail : dict, optional
            Anything else worth keeping (JSON-serialisable).

        Returns
        -------
        None
        """
        with self._write() as conn:
            aid = self._annotator_id(conn, annotator) if annotator else None
            self._event(conn, kind, tile_id=tile_id, annotator_id=aid, detail=detail)

    def events(
        self, *, since: datetime | None = None, kind: str | None = None
    ) -> list[EventRecord]:
        """The event log, optionally from a time on and of one kind.

        Parameters
        ----------
        since : datetime, optional
            Only events at or after this time (timezone-aware).
        kind : str, optional
            Only events of this kind.

        Returns
        -------
        list of EventRecord
            Oldest first.
        """
        q = sa.select(t.events, t.annotators.c.name.label("annotator")).select_from(
            t.events.outerjoin(t.annotators, t.events.c.annotator_id == t.annotators.c.id)
        )
        if kind is not None:
            q = q.where(t.events.c.kind == kind)
        with self._read() as conn:
            rows = [
                EventRecord(r.id, as_utc(r.at), r.kind, r.tile_id, r.annotator, r.detail)
                for r in conn.execute(q.order_by(t.events.c.id))
            ]
        if since is not None:
            rows = [e for e in rows if e.at >= since]
        return rows

    def state_counts(self, *, image_id: int | None = None) -> dict[str, int]:
        """Number of tiles per state.

        Parameters
        ----------
        image_id : int, optional
            Only tiles of this image.

        Returns
        -------
        dict of str to int
            Every state of :data:`labeler.states.STATES`, in that order, zeros included.
        """
        q = sa.select(t.tiles.c.state, sa.func.count()).group_by(t.tiles.c.state)
        if image_id is not None:
            q = q.where(t.tiles.c.image_id == image_id)
        with self._read() as conn:
            found = dict(conn.execute(q).all())
        return {s: int(found.get(s, 0)) for s in STATES}

    def annotator_counts(self) -> dict[str, dict[str, float]]:
        """Effort per annotator, counted from the annotation rows.

        Returns
        -------
        dict of str to dict
            Per annotator name: ``tiles`` (distinct tiles with a full save),
            ``weak_labels`` (distinct tiles with a weak-label save), ``seconds`` and
            ``actions`` (summed over every save).
        """
        q = (
            sa.select(
                t.annotators.c.name,
                t.annotations.c.kind,
                sa.func.count(sa.distinct(t.annotations.c.tile_id)),
                sa.func.sum(t.annotations.c.seconds),
                sa.func.sum(t.annotations.c.actions),
            )
            .select_from(
                t.annotations.join(t.annotators, t.annotations.c.annotator_id == t.annotators.c.id)
            )
            .group_by(t.annotators.c.name, t.annotations.c.kind)
        )
        out: dict[str, dict[str, float]] = {}
        with self._read() as conn:
            for name, kind, n, secs, acts in conn.execute(q):
                d = out.setdefault(
                    name, {"tiles": 0, "weak_labels": 0, "seconds": 0.0, "actions": 0}
                )
                d["tiles" if kind == KIND_FULL else "weak_labels"] += int(n)
                d["seconds"] += float(secs or 0.0)
                d["actions"] += int(acts or 0)
        return out
