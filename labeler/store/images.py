"""Images and their tiles: adding an image with its tile grid, reading them back.

An image and all its tiles land in one transaction. A share of the tiles is marked as
*overlap* tiles (handed to several annotators for agreement), chosen by a stable hash so
that the choice does not depend on the order images are added in.
"""

from __future__ import annotations

import hashlib
from collections.abc import Iterable, Sequence
from dataclasses import dataclass

import sqlalchemy as sa

from labeler.errors import LabelerError, NotFoundError
from labeler.imagery.tiling import Window
from labeler.states import UNSEEN
from labeler.store import schema as t
from labeler.store.base import StoreBase, as_utc, clock
from labeler.store.dialect import insert_ignoring
from labeler.store.records import ImageRecord, TileRecord

__all__ = ["NewImage", "ImagesMixin", "overlap_draw"]


@dataclass(frozen=True)
class NewImage:
    """What :meth:`Store.add_image` needs to know of an image.

    ``transform`` holds the affine coefficients a, b, c, d, e, f (pixel corners) of a
    georeferenced image; ``georef_source`` says where they came from.
    """

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
    #: bytes of the file (a cheap first check that a file is still the one added)
    size: int | None = None


def overlap_draw(sha256: str, window: Window, *, seed: int) -> float:
    """A stable number in [0, 1) per image window; below the overlap share = overlap tile.

    Parameters
    ----------
    sha256 : str
        The image's content hash.
    window : Window
        The tile's window in the image.
    seed : int
        The project's overlap seed.

    Returns
    -------
    float
        The first 8 bytes of SHA-256 of ``"sha:row:col:seed"`` over 2**64.
    """
    key = f"{sha256}:{window.row}:{window.col}:{seed}".encode()
    return int.from_bytes(hashlib.sha256(key).digest()[:8], "big") / 2**64


def _image_row(r: sa.Row) -> ImageRecord:
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
        size=r.size,
        added_at=as_utc(r.added_at),
    )


def _tile_query() -> sa.Select:
    return sa.select(t.tiles, t.annotators.c.name.label("holder")).select_from(
        t.tiles.outerjoin(t.annotators, t.tiles.c.held_by == t.annotators.c.id)
    )


def _tile_row(r: sa.Row) -> TileRecord:
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
        updated_at=as_utc(r.updated_at),
    )


class ImagesMixin(StoreBase):
    """Images and tiles of :class:`labeler.store.Store`."""

    def add_image(
        self,
        image: NewImage,
        windows: Sequence[Window],
        *,
        overlap_share: float = 0.0,
        overlap_seed: int = 0,
    ) -> ImageRecord:
        """Add an image and its tiles in one transaction (all or nothing).

        Every tile starts ``unseen``.

        Parameters
        ----------
        image : NewImage
            The image's name, path, content hash, size and georeferencing.
        windows : sequence of Window
            The tile grid (row, column, height, width in image pixels).
        overlap_share : float
            Share of tiles marked as overlap tiles for agreement, in [0, 1]; a tile is
            one when :func:`overlap_draw` of its window is below the share.
        overlap_seed : int
            Seed of that draw (a project setting).

        Returns
        -------
        ImageRecord
            The stored image.

        Raises
        ------
        LabelerError
            If ``windows`` is empty, or an image with the same sha256 or name is already
            in the store (nothing is written).
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
            stamp = clock(conn)
            values = dict(
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
                size=image.size,
            )
            # insert-or-read: another machine may add the same image at this moment
            if not insert_ignoring(conn, t.images, values, keys=None):
                dup = conn.execute(
                    sa.select(t.images.c.name).where(
                        (t.images.c.sha256 == image.sha256) | (t.images.c.name == image.name)
                    )
                ).first()
                raise LabelerError(
                    f"{image.name}: already in the project as {dup.name if dup else image.name!r}"
                )
            image_id = int(
                conn.execute(
                    sa.select(t.images.c.id).where(t.images.c.sha256 == image.sha256)
                ).scalar()
            )
            rows = [
                dict(
                    image_id=image_id,
                    row=w.row,
                    col=w.col,
                    height=w.height,
                    width=w.width,
                    state=UNSEEN,
                    overlap=bool(overlap_draw(image.sha256, w, seed=overlap_seed) < overlap_share),
                    held_by=None,
                    updated_at=stamp,
                )
                for w in windows
            ]
            conn.execute(t.tiles.insert(), rows)
            self._event(conn, "image_added", detail={"image": image.name, "tiles": len(rows)})
            row = conn.execute(sa.select(t.images).where(t.images.c.id == image_id)).one()
            return _image_row(row)

    def image_by_sha(self, sha256: str) -> ImageRecord | None:
        """The image with this content hash.

        Parameters
        ----------
        sha256 : str
            Hex SHA-256 of the image file.

        Returns
        -------
        ImageRecord or None
            None when no image has this hash.
        """
        with self._read() as conn:
            r = conn.execute(sa.select(t.images).where(t.images.c.sha256 == sha256)).first()
            return None if r is None else _image_row(r)

    def images(self) -> list[ImageRecord]:
        """Every image, in order of addition.

        Returns
        -------
        list of ImageRecord
        """
        with self._read() as conn:
            return [
                _image_row(r) for r in conn.execute(sa.select(t.images).order_by(t.images.c.id))
            ]

    def image(self, image_id: int) -> ImageRecord:
        """One image by id.

        Parameters
        ----------
        image_id : int

        Returns
        -------
        ImageRecord

        Raises
        ------
        NotFoundError
            If no image has this id.
        """
        with self._read() as conn:
            r = conn.execute(sa.select(t.images).where(t.images.c.id == image_id)).first()
        if r is None:
            raise NotFoundError(f"image {image_id} is not in this project")
        return _image_row(r)

    def image_by_name(self, name: str) -> ImageRecord:
        """One image by its name (file stem).

        Parameters
        ----------
        name : str

        Returns
        -------
        ImageRecord

        Raises
        ------
        NotFoundError
            If no image has this name.
        """
        with self._read() as conn:
            r = conn.execute(sa.select(t.images).where(t.images.c.name == name)).first()
        if r is None:
            raise NotFoundError(f"image {name!r} is not in this project")
        return _image_row(r)

    def tiles(
        self,
        *,
        image_id: int | None = None,
        states: Iterable[str] | None = None,
        overlap: bool | None = None,
    ) -> list[TileRecord]:
        """Tiles, optionally of one image, in some states, overlap or not.

        Parameters
        ----------
        image_id : int, optional
            Only tiles of this image.
        states : iterable of str, optional
            Only tiles in one of these states.
        overlap : bool, optional
            Only overlap tiles (True) or only ordinary ones (False).

        Returns
        -------
        list of TileRecord
            In id order.
        """
        q = _tile_query()
        if image_id is not None:
            q = q.where(t.tiles.c.image_id == image_id)
        if states is not None:
            q = q.where(t.tiles.c.state.in_(list(states)))
        if overlap is not None:
            q = q.where(t.tiles.c.overlap == overlap)
        with self._read() as conn:
            return [_tile_row(r) for r in conn.execute(q.order_by(t.tiles.c.id))]

    def tile(self, tile_id: int) -> TileRecord:
        """One tile by id.

        Parameters
        ----------
        tile_id : int

        Returns
        -------
        TileRecord

        Raises
        ------
        NotFoundError
            If no tile has this id.
        """
        with self._read() as conn:
            r = conn.execute(_tile_query().where(t.tiles.c.id == tile_id)).first()
        if r is None:
            raise NotFoundError(f"tile {tile_id} is not in this project")
        return _tile_row(r)
