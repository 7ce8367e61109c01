"""The project store: every read and write of the database goes through :class:`Store`.

Saves are single transactions. An annotation save carries the version it was based on
(``parent_version``); a save based on a stale version raises
:class:`labeler.errors.ConflictError` and writes nothing. Versions are numbered per
tile (1, 2, ...); the unique constraint on (tile, version) makes two racing writers
collide instead of both landing, on SQLite and on PostgreSQL alike.

Lineage: on an ordinary tile the newest version of the tile is the parent a save must
name. On an *overlap* tile (given to several annotators for agreement) each annotator
has an own lineage until a reviewer settles the tile, so independent first saves do
not conflict and nobody sees another's mask before saving (see
:meth:`Store.visible_annotation`).
"""

from __future__ import annotations

import hashlib
from collections.abc import Iterable, Sequence
from contextlib import contextmanager
from dataclasses import dataclass
from datetime import UTC, datetime

import numpy as np
import sqlalchemy as sa
from sqlalchemy.exc import IntegrityError, OperationalError

from labeler.classes import DEFAULT_SCHEMA, ClassSchema
from labeler.errors import ConflictError, LabelerError, NotFoundError
from labeler.imagery.tiling import Window
from labeler.imagery.write import png_bytes
from labeler.states import (
    AMENDED,
    ANNOTATION_KINDS,
    ANNOTATION_STATES,
    HELD,
    PARKED,
    PROPOSED,
    SAVED_STATES,
    SETTLED,
    STATES,
    UNSEEN,
    check_move,
)
from labeler.store import schema as t
from labeler.store.dialect import integrity_check, make_engine
from labeler.store.records import (
    AnnotationRecord,
    DraftRecord,
    EventRecord,
    ImageRecord,
    ModelVersionRecord,
    ProposalRecord,
    RankingItem,
    TileRecord,
    decode_mask,
    npy_bytes,
)

__all__ = ["Store", "NewImage", "NewAnnotation", "NewProposal", "now"]

_SAVE_RETRIES = 8


def now() -> datetime:
    """The current time, UTC, timezone-aware."""
    return datetime.now(UTC)


def _utc(value: datetime | None) -> datetime | None:
    if value is None:
        return None
    return value if value.tzinfo is not None else value.replace(tzinfo=UTC)


@dataclass(frozen=True)
class NewImage:
    """What :meth:`Store.add_image` needs to know of an image."""

    name: str
    path: str
    sha256: str
    width: int
    height: int
    bands: int
    dtype: str
    crs: str | None = None
    transform: tuple[float, ...] | None = None
    georef_source: str | None = None


@dataclass(frozen=True)
class NewAnnotation:
    """One annotation to save (see :meth:`Store.save_annotation` for the fields)."""

    tile_id: int
    annotator: str
    mask: np.ndarray
    parent_version: int | None
    kind: str = "full"
    state: str = "amended"
    seconds: float = 0.0
    actions: int = 0
    source: str = "editor"
    proposal_id: int | None = None
    tile_state: str | None = None


@dataclass(frozen=True)
class NewProposal:
    """One proposal to store (mask (H, W) uint8 plus optional uncertainty)."""

    tile_id: int
    mask: np.ndarray
    uncertainty: np.ndarray | None = None  # (3, h, w) float16
    embedding: np.ndarray | None = None  # (D,) float32
    mean_entropy: float | None = None
    mean_margin: float | None = None
    mean_bald: float | None = None
    mean_least_confidence: float | None = None
    class_fractions: Sequence[float] | None = None


class Store:
    """A project database.

    Parameters
    ----------
    url : str
        SQLAlchemy URL (``sqlite:////abs/path/labeler.db`` by default).
    schema : ClassSchema
        Label classes; saved masks are checked against them.
    create : bool
        Create the tables when the database is new. Without it, opening a database
        that has no tables is an error (a mistyped project path must not create one).
    """

    def __init__(
        self, url: str, *, schema: ClassSchema = DEFAULT_SCHEMA, create: bool = False
    ) -> None:
        self.url = url
        self.schema = schema
        self.engine = make_engine(url)
        try:
            insp = sa.inspect(self.engine)
            has_tables = insp.has_table("meta")
        except OperationalError as exc:
            raise LabelerError(f"store {url}: cannot open the database ({exc.orig})") from None
        if not has_tables:
            if not create:
                raise LabelerError(
                    f"store {url}: no labeler project database here; run 'labeler init' first"
                )
            with self._write() as conn:
                t.metadata.create_all(conn)
                conn.execute(
                    t.meta.insert(), [{"key": "schema_version", "value": str(t.SCHEMA_VERSION)}]
                )
        else:
            with self.engine.connect() as conn:
                found = conn.execute(
                    sa.select(t.meta.c.value).where(t.meta.c.key == "schema_version")
                ).scalar()
            if found != str(t.SCHEMA_VERSION):
                raise LabelerError(
                    f"store {url}: database schema version {found}, this labeler reads "
                    f"{t.SCHEMA_VERSION}; use the matching labeler release"
                )

    # -- plumbing -----------------------------------------------------------------------
    @contextmanager
    def _write(self):
        with self.engine.connect().execution_options(write=True) as conn:
            with conn.begin():
                yield conn

    @contextmanager
    def _read(self):
        with self.engine.connect() as conn:
            with conn.begin():
                yield conn

    def close(self) -> None:
        """Release the database connections."""
        self.engine.dispose()

    def __enter__(self) -> Store:
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def integrity_check(self) -> str:
        """The database's consistency check (``"ok"`` when sound)."""
        return integrity_check(self.engine)

    @staticmethod
    def _event(conn, kind: str, *, tile_id=None, annotator_id=None, detail=None) -> None:
        conn.execute(
            t.events.insert().values(
                at=now(), kind=kind, tile_id=tile_id, annotator_id=annotator_id, detail=detail
            )
        )

    def log_event(
        self,
        kind: str,
        *,
        tile_id: int | None = None,
        annotator: str | None = None,
        detail: dict | None = None,
    ) -> None:
        """Append one row to the event log."""
        with self._write() as conn:
            aid = self._annotator_id(conn, annotator) if annotator else None
            self._event(conn, kind, tile_id=tile_id, annotator_id=aid, detail=detail)

    # -- annotators ---------------------------------------------------------------------
    @staticmethod
    def _annotator_id(conn, name: str, *, create: bool = True) -> int:
        name = name.strip() if isinstance(name, str) else name
        if not name:
            raise LabelerError(
                "annotator: expected a non-empty name, got an empty one; pass --annotator NAME"
            )
        found = conn.execute(
            sa.select(t.annotators.c.id).where(t.annotators.c.name == name)
        ).scalar()
        if found is not None:
            return int(found)
        if not create:
            raise NotFoundError(f"annotator {name!r} is not known in this project")
        res = conn.execute(t.annotators.insert().values(name=name, created_at=now()))
        return int(res.inserted_primary_key[0])

    def annotators(self) -> list[str]:
        """Names of every annotator, in order of first appearance."""
        with self._read() as conn:
            return list(
                conn.execute(sa.select(t.annotators.c.name).order_by(t.annotators.c.id)).scalars()
            )

    def ensure_annotator(self, name: str) -> int:
        """The id of annotator ``name``, created if new."""
        with self._write() as conn:
            return self._annotator_id(conn, name)

    # -- images and tiles ---------------------------------------------------------------
    @staticmethod
    def _image_row(r) -> ImageRecord:
        return ImageRecord(
            id=r.id,
            name=r.name,
            path=r.path,
            sha256=r.sha256,
            width=r.width,
            height=r.height,
            bands=r.bands,
            dtype=r.dtype,
            crs=r.crs,
            transform=None if r.transform is None else tuple(float(v) for v in r.transform),
            georef_source=r.georef_source,
            added_at=_utc(r.added_at),
        )

    def add_image(
        self,
        image: NewImage,
        windows: Sequence[Window],
        *,
        overlap_share: float = 0.0,
        overlap_seed: int = 0,
    ) -> ImageRecord:
        """Add an image and its tiles in one transaction (all or nothing).

        ``overlap_share`` of the tiles (chosen by a stable hash of image sha256, window
        and ``overlap_seed``) are marked as overlap tiles for agreement.

        Raises
        ------
        LabelerError
            If an image with the same sha256 or name is already in the store.
        """
        if not windows:
            raise LabelerError(f"{image.name}: expected at least one tile window, got none")
        with self._write() as conn:
            dup = conn.execute(
                sa.select(t.images.c.name).where(
                    (t.images.c.sha256 == image.sha256) | (t.images.c.name == image.name)
                )
            ).first()
            if dup is not None:
                raise LabelerError(f"{image.name}: already in the project as {dup.name!r}")
            stamp = now()
            res = conn.execute(
                t.images.insert().values(
                    name=image.name,
                    path=image.path,
                    sha256=image.sha256,
                    width=image.width,
                    height=image.height,
                    bands=image.bands,
                    dtype=image.dtype,
                    crs=image.crs,
                    transform=None if image.transform is None else list(image.transform),
                    georef_source=image.georef_source,
                    added_at=stamp,
                )
            )
            image_id = int(res.inserted_primary_key[0])
            rows = []
            for w in windows:
                key = f"{image.sha256}:{w.row}:{w.col}:{overlap_seed}".encode()
                u = int.from_bytes(hashlib.sha256(key).digest()[:8], "big") / 2**64
                rows.append(
                    dict(
                        image_id=image_id,
                        row=w.row,
                        col=w.col,
                        height=w.height,
                        width=w.width,
                        state=UNSEEN,
                        overlap=bool(u < overlap_share),
                        held_by=None,
                        updated_at=stamp,
                    )
                )
            conn.execute(t.tiles.insert(), rows)
            self._event(conn, "image_added", detail={"image": image.name, "tiles": len(rows)})
            row = conn.execute(sa.select(t.images).where(t.images.c.id == image_id)).one()
            return self._image_row(row)

    def image_by_sha(self, sha256: str) -> ImageRecord | None:
        """The image with this content hash, or None."""
        with self._read() as conn:
            r = conn.execute(sa.select(t.images).where(t.images.c.sha256 == sha256)).first()
            return None if r is None else self._image_row(r)

    def images(self) -> list[ImageRecord]:
        """Every image, in order of addition."""
        with self._read() as conn:
            return [
                self._image_row(r)
                for r in conn.execute(sa.select(t.images).order_by(t.images.c.id))
            ]

    def image(self, image_id: int) -> ImageRecord:
        """One image by id."""
        with self._read() as conn:
            r = conn.execute(sa.select(t.images).where(t.images.c.id == image_id)).first()
        if r is None:
            raise NotFoundError(f"image {image_id} is not in this project")
        return self._image_row(r)

    def image_by_name(self, name: str) -> ImageRecord:
        """One image by its name (file stem)."""
        with self._read() as conn:
            r = conn.execute(sa.select(t.images).where(t.images.c.name == name)).first()
        if r is None:
            raise NotFoundError(f"image {name!r} is not in this project")
        return self._image_row(r)

    def _tile_query(self):
        return sa.select(t.tiles, t.annotators.c.name.label("holder")).select_from(
            t.tiles.outerjoin(t.annotators, t.tiles.c.held_by == t.annotators.c.id)
        )

    @staticmethod
    def _tile_row(r) -> TileRecord:
        return TileRecord(
            id=r.id,
            image_id=r.image_id,
            row=r.row,
            col=r.col,
            height=r.height,
            width=r.width,
            state=r.state,
            overlap=bool(r.overlap),
            held_by=r.holder,
            updated_at=_utc(r.updated_at),
        )

    def tiles(
        self,
        *,
        image_id: int | None = None,
        states: Iterable[str] | None = None,
        overlap: bool | None = None,
    ) -> list[TileRecord]:
        """Tiles, optionally of one image, in some states, overlap or not (id order)."""
        q = self._tile_query()
        if image_id is not None:
            q = q.where(t.tiles.c.image_id == image_id)
        if states is not None:
            q = q.where(t.tiles.c.state.in_(list(states)))
        if overlap is not None:
            q = q.where(t.tiles.c.overlap == overlap)
        with self._read() as conn:
            return [self._tile_row(r) for r in conn.execute(q.order_by(t.tiles.c.id))]

    def tile(self, tile_id: int) -> TileRecord:
        """One tile by id."""
        with self._read() as conn:
            r = conn.execute(self._tile_query().where(t.tiles.c.id == tile_id)).first()
        if r is None:
            raise NotFoundError(f"tile {tile_id} is not in this project")
        return self._tile_row(r)

    def set_state(
        self, tile_id: int, state: str, *, annotator: str | None = None, reason: str | None = None
    ) -> TileRecord:
        """Move a tile to ``state`` (checked against the life cycle), logging the move."""
        if state not in STATES:
            raise LabelerError(f"state: expected one of {', '.join(STATES)}, got {state!r}")
        with self._write() as conn:
            cur = conn.execute(sa.select(t.tiles.c.state).where(t.tiles.c.id == tile_id)).scalar()
            if cur is None:
                raise NotFoundError(f"tile {tile_id} is not in this project")
            try:
                check_move(cur, state, tile=f"tile {tile_id}")
            except ValueError as exc:
                raise LabelerError(str(exc)) from None
            aid = self._annotator_id(conn, annotator) if annotator else None
            held = aid if state == HELD else None
            conn.execute(
                t.tiles.update()
                .where(t.tiles.c.id == tile_id)
                .values(state=state, held_by=held, updated_at=now())
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
        """Mark the tile ``held`` by ``annotator`` (opened in the editor), noting the prior state.

        Saved tiles keep their saved state; the hold is recorded in the event log and
        in ``held_by`` only, so a crash leaves no tile stuck in ``held``.
        """
        with self._write() as conn:
            cur = conn.execute(sa.select(t.tiles.c.state).where(t.tiles.c.id == tile_id)).scalar()
            if cur is None:
                raise NotFoundError(f"tile {tile_id} is not in this project")
            aid = self._annotator_id(conn, annotator)
            new = HELD if cur in (UNSEEN, PROPOSED, PARKED) else cur
            conn.execute(
                t.tiles.update()
                .where(t.tiles.c.id == tile_id)
                .values(state=new, held_by=aid, updated_at=now())
            )
            self._assign(conn, tile_id, aid)
            self._event(
                conn, "hold", tile_id=tile_id, annotator_id=aid, detail={"from": cur, "to": new}
            )
        return self.tile(tile_id)

    def release(self, tile_id: int, annotator: str) -> TileRecord:
        """Undo :meth:`hold` without a save: ``held`` goes back to proposed/unseen."""
        with self._write() as conn:
            row = conn.execute(sa.select(t.tiles).where(t.tiles.c.id == tile_id)).first()
            if row is None:
                raise NotFoundError(f"tile {tile_id} is not in this project")
            aid = self._annotator_id(conn, annotator)
            new = row.state
            if row.state == HELD:
                has_prop = conn.execute(
                    sa.select(sa.func.count())
                    .select_from(t.proposals)
                    .where(t.proposals.c.tile_id == tile_id)
                ).scalar()
                new = PROPOSED if has_prop else UNSEEN
            conn.execute(
                t.tiles.update()
                .where(t.tiles.c.id == tile_id)
                .values(state=new, held_by=None, updated_at=now())
            )
            self._event(conn, "release", tile_id=tile_id, annotator_id=aid, detail={"to": new})
        return self.tile(tile_id)

    # -- overlap assignment -------------------------------------------------------------
    @staticmethod
    def _assign(conn, tile_id: int, annotator_id: int) -> None:
        exists = conn.execute(
            sa.select(t.assignments.c.tile_id).where(
                (t.assignments.c.tile_id == tile_id)
                & (t.assignments.c.annotator_id == annotator_id)
            )
        ).first()
        if exists is None:
            conn.execute(
                t.assignments.insert().values(
                    tile_id=tile_id, annotator_id=annotator_id, assigned_at=now()
                )
            )

    def assigned(self, tile_id: int) -> list[str]:
        """Annotators the tile has been handed to (in order)."""
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

    def savers(self, tile_id: int, *, kind: str = "full") -> list[str]:
        """Distinct annotators with a saved annotation of ``kind`` on the tile."""
        with self._read() as conn:
            return self._savers(conn, tile_id, kind=kind)

    @staticmethod
    def _savers(conn, tile_id: int, *, kind: str = "full") -> list[str]:
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
        return sorted(conn.execute(q).scalars())

    def available_for(self, annotator: str, *, per_overlap_tile: int = 2) -> list[int]:
        """Tile ids this annotator may be handed next (no order implied).

        Ordinary tiles: not yet saved by anyone, not held by someone else. Overlap tiles:
        not yet saved by this annotator and handed to fewer than ``per_overlap_tile``
        annotators (or already handed to this one). Contested and settled tiles are not
        handed out here (reviewers settle them).
        """
        out: list[int] = []
        with self._read() as conn:
            me = conn.execute(
                sa.select(t.annotators.c.id).where(t.annotators.c.name == annotator)
            ).scalar()
            rows = conn.execute(sa.select(t.tiles).order_by(t.tiles.c.id)).all()
            saved_by: dict[int, set[int]] = {}
            for tid, aid in conn.execute(
                sa.select(t.annotations.c.tile_id, t.annotations.c.annotator_id).where(
                    t.annotations.c.kind == "full"
                )
            ):
                saved_by.setdefault(tid, set()).add(aid)
            handed: dict[int, set[int]] = {}
            for tid, aid in conn.execute(
                sa.select(t.assignments.c.tile_id, t.assignments.c.annotator_id)
            ):
                handed.setdefault(tid, set()).add(aid)
        for r in rows:
            if r.state in ("contested", SETTLED):
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

    # -- annotations --------------------------------------------------------------------
    @staticmethod
    def _annotation_query():
        return sa.select(t.annotations, t.annotators.c.name.label("annotator")).select_from(
            t.annotations.join(t.annotators, t.annotations.c.annotator_id == t.annotators.c.id)
        )

    @staticmethod
    def _annotation_row(r) -> AnnotationRecord:
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
            created_at=_utc(r.created_at),
            mask_png=r.mask_png,
        )

    def _lineage_head(self, conn, tile, annotator_id: int, *, settling: bool) -> int | None:
        """Newest version a save must be based on (None = no saved version yet)."""
        q = sa.select(sa.func.max(t.annotations.c.version)).where(
            t.annotations.c.tile_id == tile.id
        )
        if tile.overlap and not settling and tile.state != SETTLED:
            q = q.where(t.annotations.c.annotator_id == annotator_id)
        return conn.execute(q).scalar()

    def _prepare(self, item: NewAnnotation) -> tuple[TileRecord, bytes, str | None]:
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
        tile_state = item.tile_state
        if tile_state is None and item.kind == "full":
            tile_state = {"imported": AMENDED, "weak": None}.get(item.state, item.state)
        return tile, data, tile_state

    def _insert_annotation(
        self, conn, item: NewAnnotation, tile: TileRecord, data: bytes, tile_state: str | None
    ) -> int:
        tile_id = item.tile_id
        parent_version = item.parent_version
        row = conn.execute(sa.select(t.tiles).where(t.tiles.c.id == tile_id)).one()
        aid = self._annotator_id(conn, item.annotator)
        head = self._lineage_head(conn, row, aid, settling=item.state == SETTLED)
        if head != parent_version:
            theirs = None
            if head is not None:
                other = conn.execute(
                    self._annotation_query().where(
                        (t.annotations.c.tile_id == tile_id) & (t.annotations.c.version == head)
                    )
                ).first()
                theirs = None if other is None else self._annotation_row(other)
            raise ConflictError(
                f"tile {tile_id}: this mask was based on version {parent_version}, "
                f"but version {head} was saved"
                + (f" by {theirs.annotator}" if theirs is not None else "")
                + " in the meantime; nothing was overwritten. Reopen the tile to "
                "see both masks.",
                tile_id=tile_id,
                parent_version=parent_version,
                current_version=head,
                theirs=theirs,
            )
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
        values = {"updated_at": stamp}
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
                    rows = conn.execute(
                        self._annotation_query().where(t.annotations.c.id.in_(ids))
                    ).all()
                by_id = {r.id: self._annotation_row(r) for r in rows}
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
        kind: str = "full",
        state: str = AMENDED,
        seconds: float = 0.0,
        actions: int = 0,
        source: str = "editor",
        proposal_id: int | None = None,
        tile_state: str | None = None,
    ) -> AnnotationRecord:
        """Save a new annotation version of a tile (one transaction).

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
        kind : {"full", "scribble"}
        state : {"accepted", "amended", "settled", "imported", "weak"}
            What the annotation records.
        seconds, actions : float, int
            Time spent and edit actions, for effort statistics.
        source : str
            Where the save came from ("editor", "queue", "import", ...).
        proposal_id : int, optional
            The proposal the annotator started from.
        tile_state : str, optional
            Tile state after the save (default: ``state`` for full masks, unchanged for
            scribbles; ``imported`` full masks leave the tile ``amended``).

        Returns
        -------
        AnnotationRecord

        Raises
        ------
        ConflictError
            If ``parent_version`` is not the lineage's newest version (someone saved
            first). Nothing is written.
        ValueError
            If the mask has the wrong shape, dtype or values.
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
        """
        if not items:
            return []
        return self._write_annotations(items)

    def annotation_history(self, tile_id: int) -> list[AnnotationRecord]:
        """Every saved version of a tile, oldest first."""
        with self._read() as conn:
            q = (
                self._annotation_query()
                .where(t.annotations.c.tile_id == tile_id)
                .order_by(t.annotations.c.version)
            )
            return [self._annotation_row(r) for r in conn.execute(q)]

    def latest_annotation(
        self, tile_id: int, *, annotator: str | None = None, kind: str | None = "full"
    ) -> AnnotationRecord | None:
        """The newest annotation of a tile (of one annotator and/or kind), or None."""
        q = self._annotation_query().where(t.annotations.c.tile_id == tile_id)
        if annotator is not None:
            q = q.where(t.annotators.c.name == annotator)
        if kind is not None:
            q = q.where(t.annotations.c.kind == kind)
        with self._read() as conn:
            r = conn.execute(q.order_by(t.annotations.c.version.desc()).limit(1)).first()
        return None if r is None else self._annotation_row(r)

    def lineage_head(self, tile_id: int, annotator: str, *, settling: bool = False) -> int | None:
        """The version a save by ``annotator`` must name as its parent now."""
        with self._read() as conn:
            row = conn.execute(sa.select(t.tiles).where(t.tiles.c.id == tile_id)).first()
            if row is None:
                raise NotFoundError(f"tile {tile_id} is not in this project")
            aid = conn.execute(
                sa.select(t.annotators.c.id).where(t.annotators.c.name == annotator)
            ).scalar()
            return self._lineage_head(conn, row, -1 if aid is None else aid, settling=settling)

    def visible_annotation(self, tile_id: int, annotator: str) -> AnnotationRecord | None:
        """The newest full mask ``annotator`` may see on the tile.

        On an overlap tile that is not settled, an annotator sees only their own masks,
        never another's, so that agreement figures stay independent. Elsewhere the
        tile's newest full mask is visible.
        """
        tile = self.tile(tile_id)
        if tile.overlap and tile.state != SETTLED:
            return self.latest_annotation(tile_id, annotator=annotator)
        return self.latest_annotation(tile_id)

    def annotations(
        self,
        *,
        since: datetime | None = None,
        kind: str | None = "full",
        tile_ids: Iterable[int] | None = None,
    ) -> list[AnnotationRecord]:
        """Annotation rows (every version), oldest first, filtered by time/kind/tiles."""
        q = self._annotation_query()
        if kind is not None:
            q = q.where(t.annotations.c.kind == kind)
        if tile_ids is not None:
            q = q.where(t.annotations.c.tile_id.in_(list(tile_ids)))
        with self._read() as conn:
            rows = [self._annotation_row(r) for r in conn.execute(q.order_by(t.annotations.c.id))]
        if since is not None:
            rows = [a for a in rows if a.created_at >= since]
        return rows

    # -- drafts -------------------------------------------------------------------------
    def save_draft(
        self,
        tile_id: int,
        annotator: str,
        mask: np.ndarray,
        *,
        scribbles: np.ndarray | None = None,
        parent_version: int | None = None,
        seconds: float = 0.0,
        actions: int = 0,
    ) -> None:
        """Keep an unsaved edit (one per tile and annotator; replaced on each autosave)."""
        tile = self.tile(tile_id)
        for name, arr in (("mask", mask), ("scribbles", scribbles)):
            if arr is not None and np.asarray(arr).shape != tile.shape:
                raise ValueError(
                    f"{name}: expected shape {tile.shape} of tile {tile_id}, "
                    f"got {np.asarray(arr).shape}"
                )
        data = png_bytes(np.asarray(mask, np.uint8))
        sdata = None if scribbles is None else png_bytes(np.asarray(scribbles, np.uint8))
        with self._write() as conn:
            aid = self._annotator_id(conn, annotator)
            conn.execute(
                t.drafts.delete().where(
                    (t.drafts.c.tile_id == tile_id) & (t.drafts.c.annotator_id == aid)
                )
            )
            conn.execute(
                t.drafts.insert().values(
                    tile_id=tile_id,
                    annotator_id=aid,
                    mask_png=data,
                    scribble_png=sdata,
                    parent_version=parent_version,
                    seconds=float(seconds),
                    actions=int(actions),
                    saved_at=now(),
                )
            )

    def load_draft(self, tile_id: int, annotator: str) -> DraftRecord | None:
        """The draft of this tile and annotator, or None."""
        tile = self.tile(tile_id)
        with self._read() as conn:
            aid = conn.execute(
                sa.select(t.annotators.c.id).where(t.annotators.c.name == annotator)
            ).scalar()
            if aid is None:
                return None
            r = conn.execute(
                sa.select(t.drafts).where(
                    (t.drafts.c.tile_id == tile_id) & (t.drafts.c.annotator_id == aid)
                )
            ).first()
        if r is None:
            return None
        what = f"draft of tile {tile_id} by {annotator}"
        return DraftRecord(
            tile_id=tile_id,
            annotator=annotator,
            parent_version=r.parent_version,
            seconds=float(r.seconds),
            actions=int(r.actions),
            saved_at=_utc(r.saved_at),
            mask=decode_mask(r.mask_png, shape=tile.shape, what=what),
            scribbles=None
            if r.scribble_png is None
            else decode_mask(r.scribble_png, shape=tile.shape, what=what),
        )

    def discard_draft(self, tile_id: int, annotator: str) -> None:
        """Delete the draft of this tile and annotator, if any."""
        with self._write() as conn:
            aid = conn.execute(
                sa.select(t.annotators.c.id).where(t.annotators.c.name == annotator)
            ).scalar()
            if aid is not None:
                conn.execute(
                    t.drafts.delete().where(
                        (t.drafts.c.tile_id == tile_id) & (t.drafts.c.annotator_id == aid)
                    )
                )

    # -- model versions and proposals ---------------------------------------------------
    @staticmethod
    def _model_row(r) -> ModelVersionRecord:
        return ModelVersionRecord(
            id=r.id,
            kind=r.kind,
            name=r.name,
            encoder_version=r.encoder_version,
            checkpoint=r.checkpoint,
            n_train_tiles=int(r.n_train_tiles),
            val_iou=r.val_iou,
            miou=r.miou,
            details=r.details,
            created_at=_utc(r.created_at),
        )

    def add_model_version(
        self,
        *,
        kind: str,
        name: str,
        encoder_version: str | None = None,
        checkpoint: str | None = None,
        n_train_tiles: int = 0,
        val_iou: dict[str, float | None] | None = None,
        miou: float | None = None,
        details: dict | None = None,
    ) -> ModelVersionRecord:
        """Record a new model version (a trained head or a cold-start rule)."""
        if kind not in ("cold_start", "head"):
            raise ValueError(f"kind: expected 'cold_start' or 'head', got {kind!r}")
        clean = (
            None
            if val_iou is None
            else {k: (None if v is None or v != v else float(v)) for k, v in val_iou.items()}
        )
        with self._write() as conn:
            res = conn.execute(
                t.model_versions.insert().values(
                    kind=kind,
                    name=name,
                    encoder_version=encoder_version,
                    checkpoint=checkpoint,
                    n_train_tiles=n_train_tiles,
                    val_iou=clean,
                    miou=None if miou is None or miou != miou else float(miou),
                    details=details,
                    created_at=now(),
                )
            )
            mid = int(res.inserted_primary_key[0])
            self._event(conn, "model_version", detail={"id": mid, "kind": kind, "name": name})
            return self._model_row(
                conn.execute(sa.select(t.model_versions).where(t.model_versions.c.id == mid)).one()
            )

    def model_versions(self) -> list[ModelVersionRecord]:
        """Every model version, oldest first."""
        with self._read() as conn:
            return [
                self._model_row(r)
                for r in conn.execute(sa.select(t.model_versions).order_by(t.model_versions.c.id))
            ]

    def latest_model_version(self, *, kind: str | None = None) -> ModelVersionRecord | None:
        """The newest model version (of a kind), or None."""
        q = sa.select(t.model_versions)
        if kind is not None:
            q = q.where(t.model_versions.c.kind == kind)
        with self._read() as conn:
            r = conn.execute(q.order_by(t.model_versions.c.id.desc()).limit(1)).first()
        return None if r is None else self._model_row(r)

    def add_proposals(self, model_version_id: int, items: Sequence[NewProposal]) -> list[int]:
        """Store proposals of one model version (one transaction); unseen tiles become proposed."""
        if not items:
            return []
        tiles = {tr.id: tr for tr in self.tiles()}
        rows = []
        stamp = now()
        for p in items:
            tr = tiles.get(p.tile_id)
            if tr is None:
                raise NotFoundError(f"tile {p.tile_id} is not in this project")
            m = np.asarray(p.mask)
            if m.shape != tr.shape:
                raise ValueError(
                    f"proposal mask: expected shape {tr.shape} of tile {tr.id}, got {m.shape}"
                )
            self.schema.check_mask(m, name=f"proposal mask of tile {tr.id}", allow_unlabelled=False)
            rows.append(
                dict(
                    tile_id=tr.id,
                    model_version_id=model_version_id,
                    mask_png=png_bytes(m.astype(np.uint8)),
                    height=tr.height,
                    width=tr.width,
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
            )
        ids = []
        with self._write() as conn:
            for r in rows:
                ids.append(
                    int(conn.execute(t.proposals.insert().values(**r)).inserted_primary_key[0])
                )
            tile_ids = [r["tile_id"] for r in rows]
            conn.execute(
                t.tiles.update()
                .where(t.tiles.c.id.in_(tile_ids) & (t.tiles.c.state == UNSEEN))
                .values(state=PROPOSED, updated_at=stamp)
            )
            self._event(
                conn, "proposed", detail={"model_version": model_version_id, "tiles": len(rows)}
            )
        return ids

    @staticmethod
    def _proposal_row(r, *, with_blobs: bool = True) -> ProposalRecord:
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
            created_at=_utc(r.created_at),
            mask_png=r.mask_png,
            uncertainty_npy=r.uncertainty if with_blobs else None,
            embedding_npy=r.embedding,
        )

    def latest_proposal(self, tile_id: int) -> ProposalRecord | None:
        """The newest proposal of a tile, or None."""
        with self._read() as conn:
            r = conn.execute(
                sa.select(t.proposals)
                .where(t.proposals.c.tile_id == tile_id)
                .order_by(t.proposals.c.id.desc())
                .limit(1)
            ).first()
        return None if r is None else self._proposal_row(r)

    def proposal(self, proposal_id: int) -> ProposalRecord:
        """One proposal by id."""
        with self._read() as conn:
            r = conn.execute(sa.select(t.proposals).where(t.proposals.c.id == proposal_id)).first()
        if r is None:
            raise NotFoundError(f"proposal {proposal_id} is not in this project")
        return self._proposal_row(r)

    def latest_proposals(self, *, with_uncertainty: bool = False) -> dict[int, ProposalRecord]:
        """The newest proposal of every tile that has one: {tile id: proposal}."""
        newest = (
            sa.select(t.proposals.c.tile_id, sa.func.max(t.proposals.c.id).label("pid"))
            .group_by(t.proposals.c.tile_id)
            .subquery()
        )
        q = sa.select(t.proposals).join(newest, t.proposals.c.id == newest.c.pid)
        with self._read() as conn:
            return {
                r.tile_id: self._proposal_row(r, with_blobs=with_uncertainty)
                for r in conn.execute(q)
            }

    # -- rankings -----------------------------------------------------------------------
    def write_ranking(
        self, *, strategy: str, k: int, seed: int, items: Sequence[RankingItem]
    ) -> int:
        """Store a new queue order; the queue reads the newest."""
        with self._write() as conn:
            rid = int(
                conn.execute(
                    t.rankings.insert().values(strategy=strategy, k=k, seed=seed, created_at=now())
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
                "ranked",
                detail={"ranking": rid, "strategy": strategy, "k": k, "tiles": len(items)},
            )
        return rid

    def latest_ranking(self) -> list[RankingItem]:
        """Items of the newest ranking, by rank (empty when never ranked)."""
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
                RankingItem(r.tile_id, r.rank, r.score, r.reason, bool(r.in_batch))
                for r in conn.execute(q)
            ]

    # -- events and statistics ----------------------------------------------------------
    def events(
        self, *, since: datetime | None = None, kind: str | None = None
    ) -> list[EventRecord]:
        """The event log, oldest first."""
        q = sa.select(t.events, t.annotators.c.name.label("annotator")).select_from(
            t.events.outerjoin(t.annotators, t.events.c.annotator_id == t.annotators.c.id)
        )
        if kind is not None:
            q = q.where(t.events.c.kind == kind)
        with self._read() as conn:
            rows = [
                EventRecord(r.id, _utc(r.at), r.kind, r.tile_id, r.annotator, r.detail)
                for r in conn.execute(q.order_by(t.events.c.id))
            ]
        if since is not None:
            rows = [e for e in rows if e.at >= since]
        return rows

    def state_counts(self, *, image_id: int | None = None) -> dict[str, int]:
        """Number of tiles per state (every state listed, zeros included)."""
        q = sa.select(t.tiles.c.state, sa.func.count()).group_by(t.tiles.c.state)
        if image_id is not None:
            q = q.where(t.tiles.c.image_id == image_id)
        with self._read() as conn:
            found = dict(conn.execute(q).all())
        return {s: int(found.get(s, 0)) for s in STATES}

    def annotator_counts(self) -> dict[str, dict[str, float]]:
        """Per annotator: tiles saved (full), scribble saves, seconds and actions spent."""
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
                d = out.setdefault(name, {"tiles": 0, "scribbles": 0, "seconds": 0.0, "actions": 0})
                d["tiles" if kind == "full" else "scribbles"] += int(n)
                d["seconds"] += float(secs or 0.0)
                d["actions"] += int(acts or 0)
        return out
