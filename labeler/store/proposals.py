"""Proposals of the model, and the picks (queue orders) the picker writes.

Each proposal is a new row tied to the model version that made it; the newest proposal
of a tile is the one shown. Storing a tile's first proposal moves it from ``unseen`` to
``proposed`` (through the life-cycle check); a tile in any later state keeps its state.
A pick is a numbered queue order (each tile with its rank, the place in the order); the
queue reads the newest. Picks are stored in the tables ``rankings`` and ``ranking_items``
and logged as events of kind :data:`PICK_EVENT`, names that existing databases hold.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import sqlalchemy as sa

from labeler.errors import NotFoundError
from labeler.imagery.write import png_bytes
from labeler.states import HELD, PROPOSED, SAVED_STATES, UNSEEN
from labeler.store import schema as t
from labeler.store.base import as_utc, clock
from labeler.store.holds import checked_move
from labeler.store.images import ImagesMixin, _tile_query, _tile_row
from labeler.store.records import PickItem, ProposalRecord, npy_bytes

__all__ = ["NewProposal", "ProposalsMixin", "PICK_EVENT"]

#: Event kind of a stored pick (the code existing databases hold).
PICK_EVENT = "ranked"
#: Ids per ``IN (...)`` list of one query (below SQLite's variable limit).
_IDS_PER_QUERY = 500


@dataclass(frozen=True)
class NewProposal:
    """One proposal to store: a mask (H, W) uint8 plus optional uncertainty figures.

    ``uncertainty`` holds downsampled maps (3, h, w) float16 (entropy, margin, BALD),
    ``embedding`` the pooled encoder embedding (D,) float32 for the picker; the
    ``mean_*`` figures and ``class_fractions`` (aligned with class indices) are per tile.
    """

    tile_id: int
    mask: np.ndarray
    uncertainty: np.ndarray | None = None  # (3, h, w) float16
    embedding: np.ndarray | None = None  # (D,) float32
    mean_entropy: float | None = None
    mean_margin: float | None = None
    mean_bald: float | None = None
    mean_least_confidence: float | None = None
    class_fractions: Sequence[float] | None = None


def _proposal_row(r: sa.Row, *, with_blobs: bool = True) -> ProposalRecord:
    return ProposalRecord(
        id=r.id,
        tile_id=r.tile_id,
        model_version_id=r.model_version_id,
        height=r.height,
        width=r.width,
        mean_entropy=r.mean_entropy,
        mean_margin=r.mean_margin,
        mean_bald=r.mean_bald,
        mean_least_confidence=r.mean_least_confidence,
        class_fractions=r.class_fractions,
        created_at=as_utc(r.created_at),
        mask_png=r.mask_png,
        uncertainty_npy=r.uncertainty if with_blobs else None,
        embedding_npy=r.embedding,
    )


class ProposalsMixin(ImagesMixin):
    """Proposals and picks of :class:`labeler.store.Store`."""

    def _proposal_values(self, p: NewProposal, tile, model_version_id: int, stamp) -> dict:
        """Check one proposal against its tile and the class schema; its row values."""
        m = np.asarray(p.mask)
        if m.shape != tile.shape:
            raise ValueError(
                f"proposal mask: expected shape {tile.shape} of tile {tile.id}, got {m.shape}"
            )
        self.schema.check_mask(m, name=f"proposal mask of tile {tile.id}", allow_unlabelled=False)
        return dict(
            tile_id=tile.id,
            model_version_id=model_version_id,
            mask_png=png_bytes(m.astype(np.uint8)),
            height=tile.height,
            width=tile.width,
            uncertainty=None
            if p.uncertainty is None
            else npy_bytes(np.asarray(p.uncertainty, np.float16)),
            embedding=None
            if p.embedding is None
            else npy_bytes(np.asarray(p.embedding, np.float32)),
            mean_entropy=p.mean_entropy,
            mean_margin=p.mean_margin,
            mean_bald=p.mean_bald,
            mean_least_confidence=p.mean_least_confidence,
            class_fractions=None
            if p.class_fractions is None
            else [float(v) for v in p.class_fractions],
            created_at=stamp,
        )

    def add_proposals(
        self, model_version_id: int, items: Sequence[NewProposal], *, only_open: bool = False
    ) -> list[int]:
        """Store proposals of one model version in one transaction.

        Tiles that were ``unseen`` become ``proposed``; every other tile keeps its state.

        Parameters
        ----------
        model_version_id : int
            The model version that made the proposals.
        items : sequence of NewProposal
            At most one per tile is usual; each mask must have its tile's shape and hold
            class indices only (no unlabelled pixels).
        only_open : bool
            Store only the proposals of tiles that have no saved full mask and that nobody
            holds, judged inside the writing transaction (a tile opened in the editor
            while the proposals were computed is left alone); the others are skipped.

        Returns
        -------
        list of int
            The new proposal ids, in the items' order (empty for no items; skipped items
            have none).

        Raises
        ------
        NotFoundError
            If a tile does not exist (nothing is written).
        ValueError
            If a mask has the wrong shape or values (nothing is written).
        """
        if not items:
            return []
        tiles = self._tiles_by_id({p.tile_id for p in items})
        rows = []
        for p in items:
            tile = tiles.get(p.tile_id)
            if tile is None:
                raise NotFoundError(f"tile {p.tile_id} is not in this project")
            rows.append(self._proposal_values(p, tile, model_version_id, None))
        ids = []
        with self._write() as conn:
            if only_open:
                closed = set(
                    conn.execute(
                        sa.select(t.tiles.c.id).where(
                            t.tiles.c.id.in_([r["tile_id"] for r in rows])
                            & (
                                t.tiles.c.state.in_((HELD, *SAVED_STATES))
                                | t.tiles.c.held_by.is_not(None)
                            )
                        )
                    ).scalars()
                )
                rows = [r for r in rows if r["tile_id"] not in closed]
                if not rows:
                    return []
            stamp = clock(conn)
            for r in rows:
                r["created_at"] = stamp
            # one statement for all rows; the ids come back in the rows' order
            inserted = conn.execute(
                t.proposals.insert().returning(t.proposals.c.id, sort_by_parameter_order=True),
                rows,
            )
            ids = [int(i) for i in inserted.scalars()]
            tile_ids = [r["tile_id"] for r in rows]
            first_time = t.tiles.c.id.in_(tile_ids) & (t.tiles.c.state == UNSEEN)
            for tile_id in conn.execute(sa.select(t.tiles.c.id).where(first_time)).scalars():
                checked_move(UNSEEN, PROPOSED, tile_id=tile_id)
            conn.execute(
                t.tiles.update().where(first_time).values(state=PROPOSED, updated_at=stamp)
            )
            self._event(
                conn, "proposed", detail={"model_version": model_version_id, "tiles": len(rows)}
            )
        return ids

    def _tiles_by_id(self, tile_ids) -> dict:
        """The tiles of some ids (``{id: TileRecord}``), read in a few queries."""
        wanted = sorted(tile_ids)
        out = {}
        with self._read() as conn:
            for start in range(0, len(wanted), _IDS_PER_QUERY):
                part = wanted[start : start + _IDS_PER_QUERY]
                for r in conn.execute(_tile_query().where(t.tiles.c.id.in_(part))):
                    out[r.id] = _tile_row(r)
        return out

    def latest_proposal_versions(self) -> dict[int, int]:
        """The model version of the newest proposal of every tile that has one.

        Reads two integers per tile and no mask: what ``labeler propose`` needs to tell
        which tiles are up to date (:meth:`latest_proposals` reads every mask too).

        Returns
        -------
        dict of int to int
            ``{tile id: model version id}``.
        """
        newest = (
            sa.select(sa.func.max(t.proposals.c.id).label("pid"))
            .group_by(t.proposals.c.tile_id)
            .subquery()
        )
        q = sa.select(t.proposals.c.tile_id, t.proposals.c.model_version_id).join(
            newest, t.proposals.c.id == newest.c.pid
        )
        with self._read() as conn:
            return {int(tid): int(mv) for tid, mv in conn.execute(q)}

    def latest_proposal(self, tile_id: int) -> ProposalRecord | None:
        """The newest proposal of a tile.

        Parameters
        ----------
        tile_id : int

        Returns
        -------
        ProposalRecord or None
            None when the tile has no proposal.
        """
        with self._read() as conn:
            r = conn.execute(
                sa.select(t.proposals)
                .where(t.proposals.c.tile_id == tile_id)
                .order_by(t.proposals.c.id.desc())
                .limit(1)
            ).first()
        return None if r is None else _proposal_row(r)

    def proposal(self, proposal_id: int) -> ProposalRecord:
        """One proposal by id.

        Parameters
        ----------
        proposal_id : int

        Returns
        -------
        ProposalRecord

        Raises
        ------
        NotFoundError
            If no proposal has this id.
        """
        with self._read() as conn:
            r = conn.execute(sa.select(t.proposals).where(t.proposals.c.id == proposal_id)).first()
        if r is None:
            raise NotFoundError(f"proposal {proposal_id} is not in this project")
        return _proposal_row(r)

    def proposal_model_versions(self) -> dict[int, int]:
        """The model version of every proposal, without reading any mask.

        Returns
        -------
        dict of int to int
            Proposal id -> id of the model version that made it.
        """
        with self._read() as conn:
            q = sa.select(t.proposals.c.id, t.proposals.c.model_version_id)
            return {int(i): int(m) for i, m in conn.execute(q)}

    def latest_proposals(self, *, with_uncertainty: bool = False) -> dict[int, ProposalRecord]:
        """The newest proposal of every tile that has one.

        Parameters
        ----------
        with_uncertainty : bool
            Also load the uncertainty maps (large); without it
            :meth:`ProposalRecord.uncertainty` returns None.

        Returns
        -------
        dict of int to ProposalRecord
            ``{tile id: proposal}``.
        """
        newest = (
            sa.select(t.proposals.c.tile_id, sa.func.max(t.proposals.c.id).label("pid"))
            .group_by(t.proposals.c.tile_id)
            .subquery()
        )
        q = sa.select(t.proposals).join(newest, t.proposals.c.id == newest.c.pid)
        with self._read() as conn:
            return {
                r.tile_id: _proposal_row(r, with_blobs=with_uncertainty) for r in conn.execute(q)
            }

    # -- picks --------------------------------------------------------------------------
    def write_pick(self, *, strategy: str, k: int, seed: int, items: Sequence[PickItem]) -> int:
        """Store a new queue order; the queue reads the newest.

        Parameters
        ----------
        strategy : str
            The picker's strategy that made the order.
        k : int
            The batch size asked for.
        seed : int
            The picker's random seed.
        items : sequence of PickItem
            Tiles with rank, score, reason and whether they are in the batch.

        Returns
        -------
        int
            The new pick's id.
        """
        with self._write() as conn:
            rid = int(
                conn.execute(
                    t.rankings.insert().values(
                        strategy=strategy, k=k, seed=seed, created_at=clock(conn)
                    )
                ).inserted_primary_key[0]
            )
            if items:
                conn.execute(
                    t.ranking_items.insert(),
                    [
                        dict(
                            ranking_id=rid,
                            tile_id=i.tile_id,
                            rank=i.rank,
                            score=float(i.score),
                            reason=i.reason,
                            in_batch=bool(i.in_batch),
                        )
                        for i in items
                    ],
                )
            self._event(
                conn,
                PICK_EVENT,
                detail={"ranking": rid, "strategy": strategy, "k": k, "tiles": len(items)},
            )
        return rid

    def latest_pick(self) -> list[PickItem]:
        """Items of the newest pick.

        Returns
        -------
        list of PickItem
            By rank; empty when nothing was picked yet.
        """
        with self._read() as conn:
            rid = conn.execute(sa.select(sa.func.max(t.rankings.c.id))).scalar()
            if rid is None:
                return []
            q = (
                sa.select(t.ranking_items)
                .where(t.ranking_items.c.ranking_id == rid)
                .order_by(t.ranking_items.c.rank)
            )
            return [
                PickItem(r.tile_id, r.rank, r.score, r.reason, bool(r.in_batch))
                for r in conn.execute(q)
            ]
