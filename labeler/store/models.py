"""Model versions: the record of every trained head, cold-start rule and adapted encoder.

A model version is only ever added, never changed; proposals name the version that made
them. Its weights (a head checkpoint or an adapted encoder, as the bytes of a
``torch.save`` file written by :mod:`labeler.model`) are kept in the database beside it,
so any machine joined to the project can propose with any version; the store keeps the
bytes and their SHA-256 and never opens them (the model room turns them into a model,
with ``torch.load(..., weights_only=True)``).

Versions are numbered 1, 2, 3 ... per kind by the database: the next number is read and
written in one transaction while writers of that kind take turns
(:func:`labeler.store.dialect.take_turns`), so two machines training at once get two
numbers, never the same name.
"""

from __future__ import annotations

import hashlib

import sqlalchemy as sa

from labeler.errors import DamagedRecordError, NotFoundError
from labeler.store import schema as t
from labeler.store.base import StoreBase, as_utc, clock
from labeler.store.dialect import insert_ignoring, take_turns
from labeler.store.records import ModelVersionRecord

__all__ = ["ModelsMixin", "MODEL_KINDS"]

#: Kinds of model version: a vegetation-index rule before any labels, a trained head, or
#: an encoder adapted to the project's tiles without labels (``labeler adapt``).
MODEL_KINDS = ("cold_start", "head", "encoder")


def _finite_or_none(value: float | None) -> float | None:
    """NaN (no pixels of a class) is stored as null; numbers as float."""
    return None if value is None or value != value else float(value)


def _model_row(r: sa.Row) -> ModelVersionRecord:
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
        created_at=as_utc(r.created_at),
        number=r.number,
        weights_sha256=r.sha256,
    )


def _versions_query() -> sa.Select:
    mv, w = t.model_versions, t.model_weights
    return sa.select(mv, w.c.sha256).select_from(
        mv.outerjoin(w, w.c.model_version_id == mv.c.id)
    )


def _put_weights(conn: sa.Connection, version_id: int, data: bytes) -> bool:
    """Keep ``data`` as the weights of a version unless it has some; True when written."""
    if not isinstance(data, bytes | bytearray | memoryview) or len(data) == 0:
        raise ValueError(
            f"weights: expected the non-empty bytes of a weights file, got "
            f"{type(data).__name__} of length {len(data) if hasattr(data, '__len__') else '?'}"
        )
    data = bytes(data)
    row = {
        "model_version_id": version_id,
        "sha256": hashlib.sha256(data).hexdigest(),
        "size": len(data),
        "data": data,
    }
    return insert_ignoring(conn, t.model_weights, row, keys=["model_version_id"]) == 1


class ModelsMixin(StoreBase):
    """Model versions of :class:`labeler.store.Store`."""

    def add_model_version(
        self,
        *,
        kind: str,
        name: str | None = None,
        encoder_version: str | None = None,
        checkpoint: str | None = None,
        n_train_tiles: int = 0,
        val_iou: dict[str, float | None] | None = None,
        miou: float | None = None,
        details: dict | None = None,
        weights: bytes | None = None,
    ) -> ModelVersionRecord:
        """Record a new model version, numbered by the database, with its weights.

        Parameters
        ----------
        kind : {"cold_start", "head", "encoder"}
        name : str, optional
            A name shown to people; default ``"<kind>-<number>"`` (``"head-3"``), the
            number being the one the database gives the version.
        encoder_version : str, optional
            The encoder the head was trained with (keys the feature cache).
        checkpoint : str, optional
            A file the weights were also written to, relative to the project.
        n_train_tiles : int
            Labelled tiles the version was trained on.
        val_iou : dict of str to float or None, optional
            Validation IoU per class name; NaN is stored as None (class absent).
        miou : float, optional
            Validation mean IoU; NaN is stored as None.
        details : dict, optional
            Anything else worth keeping (JSON-serialisable).
        weights : bytes, optional
            The version's weights file as bytes (:func:`labeler.model.checkpoint.
            checkpoint_bytes`, or an adapted encoder's); kept in the same transaction.

        Returns
        -------
        ModelVersionRecord
            The stored version (with its id, number and the weights' SHA-256).

        Raises
        ------
        ValueError
            If ``kind`` is not one of :data:`MODEL_KINDS`, or ``weights`` is given but
            is not non-empty bytes.
        """
        if kind not in MODEL_KINDS:
            raise ValueError(f"kind: expected one of {MODEL_KINDS}, got {kind!r}")
        if weights is not None and (
            not isinstance(weights, bytes | bytearray | memoryview) or len(weights) == 0
        ):
            raise ValueError(
                f"weights: expected the non-empty bytes of a weights file, got "
                f"{type(weights).__name__}"
            )
        clean = None if val_iou is None else {k: _finite_or_none(v) for k, v in val_iou.items()}
        mv = t.model_versions
        with self._write() as conn:
            take_turns(conn, f"model_versions:{kind}")
            last = conn.execute(sa.select(sa.func.max(mv.c.number)).where(mv.c.kind == kind))
            number = int(last.scalar() or 0) + 1
            shown = name if name is not None else f"{kind}-{number}"
            res = conn.execute(
                mv.insert().values(
                    kind=kind,
                    name=shown,
                    number=number,
                    encoder_version=encoder_version,
                    checkpoint=checkpoint,
                    n_train_tiles=n_train_tiles,
                    val_iou=clean,
                    miou=_finite_or_none(miou),
                    details=details,
                    created_at=clock(conn),
                )
            )
            mid = int(res.inserted_primary_key[0])
            if weights is not None:
                _put_weights(conn, mid, weights)
            self._event(conn, "model_version", detail={"id": mid, "kind": kind, "name": shown})
            return _model_row(conn.execute(_versions_query().where(mv.c.id == mid)).one())

    def put_model_weights(self, version_id: int, weights: bytes) -> bool:
        """Keep the weights of a version that has none in the database yet.

        For versions made before the weights were kept in the database: their file is
        read in once (``labeler upgrade``, or the first machine that opens the version
        and has the file). Weights already kept are never replaced.

        Parameters
        ----------
        version_id : int
        weights : bytes
            The weights file's bytes.

        Returns
        -------
        bool
            True when written; False when the version already had weights.

        Raises
        ------
        NotFoundError
            If there is no such version.
        ValueError
            If ``weights`` is not non-empty bytes.
        """
        with self._write() as conn:
            found = conn.execute(
                sa.select(t.model_versions.c.id).where(t.model_versions.c.id == version_id)
            ).scalar()
            if found is None:
                raise NotFoundError(f"model version {version_id}: no such model version")
            written = _put_weights(conn, version_id, weights)
            if written:
                self._event(conn, "model_weights_kept", detail={"id": version_id})
            return written

    def model_weights(self, version_id: int) -> bytes | None:
        """The weights of a version, checked against the SHA-256 kept with them.

        Parameters
        ----------
        version_id : int

        Returns
        -------
        bytes or None
            None when the database keeps no weights for the version.

        Raises
        ------
        DamagedRecordError
            If the bytes read back do not have the SHA-256 they were kept with.
        """
        w = t.model_weights
        with self._read() as conn:
            row = conn.execute(
                sa.select(w.c.sha256, w.c.data).where(w.c.model_version_id == version_id)
            ).first()
        if row is None:
            return None
        data = bytes(row.data)
        if hashlib.sha256(data).hexdigest() != row.sha256:
            raise DamagedRecordError(
                f"model version {version_id}: its weights in the database do not match the "
                "SHA-256 they were kept with; restore the database from a backup, or "
                "retrain ('labeler retrain')"
            )
        return data

    def model_versions(self) -> list[ModelVersionRecord]:
        """Every model version.

        Returns
        -------
        list of ModelVersionRecord
            Oldest first.
        """
        with self._read() as conn:
            return [
                _model_row(r)
                for r in conn.execute(_versions_query().order_by(t.model_versions.c.id))
            ]

    def model_version(self, version_id: int) -> ModelVersionRecord:
        """One model version.

        Parameters
        ----------
        version_id : int

        Returns
        -------
        ModelVersionRecord

        Raises
        ------
        NotFoundError
            If there is no such version.
        """
        with self._read() as conn:
            r = conn.execute(
                _versions_query().where(t.model_versions.c.id == version_id)
            ).first()
        if r is None:
            raise NotFoundError(f"model version {version_id}: no such model version")
        return _model_row(r)

    def latest_model_version(self, *, kind: str | None = None) -> ModelVersionRecord | None:
        """The newest model version, optionally of one kind.

        Parameters
        ----------
        kind : {"cold_start", "head", "encoder"}, optional

        Returns
        -------
        ModelVersionRecord or None
            None when there is no such version.
        """
        q = _versions_query()
        if kind is not None:
            q = q.where(t.model_versions.c.kind == kind)
        with self._read() as conn:
            r = conn.execute(q.order_by(t.model_versions.c.id.desc()).limit(1)).first()
        return None if r is None else _model_row(r)
