"""Tile state moves, holds, and who a tile is handed to.

Every change of ``tiles.state`` anywhere in the store (explicit moves, holds, releases,
new proposals, saves) passes :func:`checked_move`, which applies the one life-cycle
check :func:`labeler.states.check_move`. A move to the state a tile already has is
checked as well, except by :meth:`HoldsMixin.release`, which leaves a tile that is not
``held`` as it is.

Holds are leases: a hold lasts ``lease_seconds`` (default 30 minutes) after the hold or
the editor's last :meth:`HoldsMixin.heartbeat`, measured by the database's clock
(:func:`labeler.store.base.clock`), so a crashed editor or a machine gone to sleep
cannot keep a tile from the team for ever. A lapsed hold is ended by
:meth:`HoldsMixin.end_lapsed_holds` (run before tiles are handed out) as if its editor
had closed without a save, and the event log says so (``hold_lapsed``).
"""

from __future__ import annotations

from datetime import timedelta

import sqlalchemy as sa

from labeler import states
from labeler.errors import LabelerError, NotFoundError
from labeler.states import (
    CONTESTED,
    HELD,
    KIND_FULL,
    PARKED,
    PROPOSED,
    SAVED_STATES,
    SETTLED,
    STATES,
    UNSEEN,
)
from labeler.store import schema as t
from labeler.store.base import as_utc, clock
from labeler.store.dialect import insert_ignoring
from labeler.store.images import ImagesMixin
from labeler.store.records import TileRecord

__all__ = ["HoldsMixin", "checked_move"]


def checked_move(state_from: str, state_to: str, *, tile_id: int) -> None:
    """The store's life-cycle check: raise unless the tile may move between the states.

    Parameters
    ----------
    state_from, state_to : str
        The tile's state now and the state asked for (see :data:`labeler.states.STATES`).
    tile_id : int
        Named in the error.

    Raises
    ------
    LabelerError
        Naming the tile, both states and the states allowed from ``state_from``, or
        the unknown state; the caller's transaction is rolled back.
    """
    try:
        # looked up at call time: labeler.states owns the table and its one check
        states.check_move(state_from, state_to, tile=f"tile {tile_id}")
    except ValueError as exc:
        raise LabelerError(str(exc)) from None


def _current_state(conn: sa.Connection, tile_id: int) -> str:
    """The tile's state, its row locked until the caller's transaction ends."""
    cur = conn.execute(
        sa.select(t.tiles.c.state).where(t.tiles.c.id == tile_id).with_for_update()
    ).scalar()
    if cur is None:
        raise NotFoundError(f"tile {tile_id} is not in this project")
    return cur


class HoldsMixin(ImagesMixin):
    """State moves, holds and assignment of :class:`labeler.store.Store`."""

    def set_state(
        self, tile_id: int, state: str, *, annotator: str | None = None, reason: str | None = None
    ) -> TileRecord:
        """Move a tile to ``state`` (checked against the life cycle), logging the move.

        Parameters
        ----------
        tile_id : int
        state : str
            One of :data:`labeler.states.STATES`. Moving to ``held`` makes ``annotator``
            the holder; any other state clears the holder.
        annotator : str, optional
            Who moved the tile (created if new); recorded in the event log.
        reason : str, optional
            Why, recorded in the event log.

        Returns
        -------
        TileRecord
            The tile after the move.

        Raises
        ------
        LabelerError
            If ``state`` is unknown or the life cycle does not allow the move.
        NotFoundError
            If the tile does not exist.
        """
        if state not in STATES:
            raise LabelerError(f"state: expected one of {', '.join(STATES)}, got {state!r}")
        with self._write() as conn:
            cur = _current_state(conn, tile_id)
            checked_move(cur, state, tile_id=tile_id)
            aid = self._annotator_id(conn, annotator) if annotator else None
            held = aid if state == HELD else None
            conn.execute(
                t.tiles.update()
                .where(t.tiles.c.id == tile_id)
                .values(
                    state=state,
                    held_by=held,
                    updated_at=clock(conn),
                    heartbeat_at=clock(conn) if held is not None else None,
                )
            )
            self._event(
                conn,
                "state",
                tile_id=tile_id,
                annotator_id=aid,
                detail={"from": cur, "to": state, "reason": reason},
            )
        return self.tile(tile_id)

    def hold(self, tile_id: int, annotator: str) -> TileRecord:
        """Mark the tile held by ``annotator`` (opened in the editor).

        An ``unseen``, ``proposed`` or ``parked`` tile becomes ``held``. A saved tile
        keeps its saved state; the hold is recorded in ``held_by`` and the event log
        only, so a crash leaves no saved tile stuck in ``held``. The tile counts as
        handed to ``annotator`` from now on (see :meth:`available_for`).

        Parameters
        ----------
        tile_id : int
        annotator : str
            The annotator opening the tile (created if new).

        Returns
        -------
        TileRecord
            The tile after the hold.

        Raises
        ------
        NotFoundError
            If the tile does not exist.
        LabelerError
            If the life cycle refuses the move.
        """
        with self._write() as conn:
            cur = _current_state(conn, tile_id)
            aid = self._annotator_id(conn, annotator)
            new = HELD if cur in (UNSEEN, PROPOSED, PARKED) else cur
            checked_move(cur, new, tile_id=tile_id)
            stamp = clock(conn)
            conn.execute(
                t.tiles.update()
                .where(t.tiles.c.id == tile_id)
                .values(state=new, held_by=aid, updated_at=stamp, heartbeat_at=stamp)
            )
            self._assign(conn, tile_id, aid)
            self._event(
                conn, "hold", tile_id=tile_id, annotator_id=aid, detail={"from": cur, "to": new}
            )
        return self.tile(tile_id)

    def release(self, tile_id: int, annotator: str) -> TileRecord:
        """Undo :meth:`hold` without a save.

        A ``held`` tile goes back to ``proposed`` (when it has a proposal) or
        ``unseen``; a tile in any other state keeps it. The holder is cleared.

        Parameters
        ----------
        tile_id : int
        annotator : str
            The annotator closing the tile; recorded in the event log.

        Returns
        -------
        TileRecord
            The tile after the release.

        Raises
        ------
        NotFoundError
            If the tile does not exist.
        """
        with self._write() as conn:
            cur = _current_state(conn, tile_id)
            aid = self._annotator_id(conn, annotator)
            new = cur
            if cur == HELD:
                has_prop = conn.execute(
                    sa.select(sa.func.count())
                    .select_from(t.proposals)
                    .where(t.proposals.c.tile_id == tile_id)
                ).scalar()
                new = PROPOSED if has_prop else UNSEEN
                checked_move(cur, new, tile_id=tile_id)
            conn.execute(
                t.tiles.update()
                .where(t.tiles.c.id == tile_id)
                .values(state=new, held_by=None, updated_at=clock(conn), heartbeat_at=None)
            )
            self._event(conn, "release", tile_id=tile_id, annotator_id=aid, detail={"to": new})
        return self.tile(tile_id)

    # -- leases -------------------------------------------------------------------------
    def heartbeat(self, tile_id: int, annotator: str) -> bool:
        """Renew ``annotator``'s hold on the tile (the editor calls this while open).

        Parameters
        ----------
        tile_id : int
        annotator : str

        Returns
        -------
        bool
            True when the hold was renewed; False when the annotator no longer holds
            the tile (it lapsed and was ended, or someone released it).
        """
        with self._write() as conn:
            aid = self._known_annotator_id(conn, annotator)
            if aid is None:
                return False
            res = conn.execute(
                t.tiles.update()
                .where((t.tiles.c.id == tile_id) & (t.tiles.c.held_by == aid))
                .values(heartbeat_at=clock(conn))
            )
            return res.rowcount == 1

    def end_lapsed_holds(self) -> list[int]:
        """End every hold whose lease ran out (no heartbeat for ``lease_seconds``).

        Each lapsed hold ends as :meth:`release` ends one: a ``held`` tile goes back
        to ``proposed`` or ``unseen``; the event log records ``hold_lapsed`` with the
        holder and their last sign of life. Times are the database's.

        Returns
        -------
        list of int
            Ids of the tiles whose hold was ended, in id order.
        """
        ended: list[int] = []
        with self._write() as conn:
            cutoff = clock(conn) - timedelta(seconds=self.lease_seconds)
            seen = sa.func.coalesce(t.tiles.c.heartbeat_at, t.tiles.c.updated_at)
            rows = conn.execute(
                sa.select(t.tiles.c.id, t.tiles.c.state, t.tiles.c.held_by, seen.label("seen"))
                .where(t.tiles.c.held_by.is_not(None) & (seen < cutoff))
                .order_by(t.tiles.c.id)
                .with_for_update()
            ).all()
            for r in rows:
                new = r.state
                if r.state == HELD:
                    has_prop = conn.execute(
                        sa.select(sa.func.count())
                        .select_from(t.proposals)
                        .where(t.proposals.c.tile_id == r.id)
                    ).scalar()
                    new = PROPOSED if has_prop else UNSEEN
                    checked_move(r.state, new, tile_id=r.id)
                conn.execute(
                    t.tiles.update()
                    .where(t.tiles.c.id == r.id)
                    .values(state=new, held_by=None, heartbeat_at=None, updated_at=clock(conn))
                )
                self._event(
                    conn,
                    "hold_lapsed",
                    tile_id=r.id,
                    annotator_id=r.held_by,
                    detail={"to": new, "last_seen": as_utc(r.seen).isoformat()},
                )
                ended.append(int(r.id))
        return ended

    def current_holds(self) -> list[tuple[int, str, float]]:
        """Who holds what now, and how long each hold has left (the database's clock).

        Returns
        -------
        list of (int, str, float)
            Tile id, holder and seconds until the hold lapses without a heartbeat
            (negative: lapsed, ended when tiles are next handed out), in tile order.
        """
        seen = sa.func.coalesce(t.tiles.c.heartbeat_at, t.tiles.c.updated_at)
        with self._read() as conn:
            at = clock(conn)
            rows = conn.execute(
                sa.select(t.tiles.c.id, t.annotators.c.name, seen.label("seen"))
                .select_from(t.tiles.join(t.annotators, t.tiles.c.held_by == t.annotators.c.id))
                .order_by(t.tiles.c.id)
            ).all()
        return [
            (int(r.id), r.name, self.lease_seconds - (at - as_utc(r.seen)).total_seconds())
            for r in rows
        ]

    # -- assignment ---------------------------------------------------------------------
    @staticmethod
    def _assign(conn: sa.Connection, tile_id: int, annotator_id: int) -> None:
        """Record that the tile was handed to the annotator (once)."""
        insert_ignoring(
            conn,
            t.assignments,
            {"tile_id": tile_id, "annotator_id": annotator_id, "assigned_at": clock(conn)},
            keys=["tile_id", "annotator_id"],
        )

    def assigned(self, tile_id: int) -> list[str]:
        """Annotators the tile has been handed to (by a hold or a save).

        Parameters
        ----------
        tile_id : int

        Returns
        -------
        list of str
            In the order they were handed the tile.
        """
        with self._read() as conn:
            q = (
                sa.select(t.annotators.c.name)
                .select_from(
                    t.assignments.join(
                        t.annotators, t.assignments.c.annotator_id == t.annotators.c.id
                    )
                )
                .where(t.assignments.c.tile_id == tile_id)
                .order_by(t.assignments.c.assigned_at)
            )
            return list(conn.execute(q).scalars())

    def savers(self, tile_id: int, *, kind: str = KIND_FULL) -> list[str]:
        """Distinct annotators with a saved annotation of ``kind`` on the tile.

        A reviewer's ``settled`` saves do not count.

        Parameters
        ----------
        tile_id : int
        kind : {KIND_FULL, KIND_WEAK}

        Returns
        -------
        list of str
            Sorted by name.
        """
        q = (
            sa.select(t.annotators.c.name)
            .distinct()
            .select_from(
                t.annotations.join(t.annotators, t.annotations.c.annotator_id == t.annotators.c.id)
            )
            .where(
                (t.annotations.c.tile_id == tile_id)
                & (t.annotations.c.kind == kind)
                & (t.annotations.c.state != SETTLED)
            )
        )
        with self._read() as conn:
            return sorted(conn.execute(q).scalars())

    def available_for(self, annotator: str, *, per_overlap_tile: int = 2) -> list[int]:
        """Tile ids this annotator may be handed next (no order implied).

        Holds whose lease ran out are ended first (:meth:`end_lapsed_holds`).
        Ordinary tiles: not yet saved by anyone, not held by someone else. Overlap
        tiles: not yet saved by this annotator and handed to fewer than
        ``per_overlap_tile`` annotators (or already handed to this one). Contested and
        settled tiles are not handed out here (reviewers settle them).

        Parameters
        ----------
        annotator : str
            May be a name the store has not seen yet.
        per_overlap_tile : int
            How many annotators each overlap tile goes to.

        Returns
        -------
        list of int
            Tile ids in id order.
        """
        self.end_lapsed_holds()
        out: list[int] = []
        with self._read() as conn:
            me = self._known_annotator_id(conn, annotator)
            rows = conn.execute(sa.select(t.tiles).order_by(t.tiles.c.id)).all()
            saved_by: dict[int, set[int]] = {}
            for tid, aid in conn.execute(
                sa.select(t.annotations.c.tile_id, t.annotations.c.annotator_id).where(
                    t.annotations.c.kind == KIND_FULL
                )
            ):
                saved_by.setdefault(tid, set()).add(aid)
            handed: dict[int, set[int]] = {}
            for tid, aid in conn.execute(
                sa.select(t.assignments.c.tile_id, t.assignments.c.annotator_id)
            ):
                handed.setdefault(tid, set()).add(aid)
        for r in rows:
            if r.state in (CONTESTED, SETTLED):
                continue
            if r.held_by is not None and r.held_by != me:
                continue
            savers = saved_by.get(r.id, set())
            if r.overlap:
                hands = handed.get(r.id, set())
                if me in savers:
                    continue
                if me not in hands and len(hands | savers) >= per_overlap_tile:
                    continue
                out.append(r.id)
            elif not savers and r.state not in SAVED_STATES:
                out.append(r.id)
        return out
