"""Model versions: the record of every trained head, cold-start rule and adapted encoder.

A model version is only ever added, never changed; proposals name the version that made
them. The weights themselves live in a checkpoint file (path relative to the project)
written by :mod:`labeler.model`; the store keeps what describes the version.
"""

from __future__ import annotations

import sqlalchemy as sa

from labeler.store import schema as t
from labeler.store.base import StoreBase, as_utc, clock
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
    )


class ModelsMixin(StoreBase):
    """Model versions of :class:`labeler.store.Store`."""

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
        """Record a new model version (a trained head or a cold-start rule).

        Parameters
        ----------
        kind : {"cold_start", "head", "encoder"}
        name : str
            A name shown to people.
        encoder_version : str, optional
            The encoder the head was trained with (keys the feature cache).
        checkpoint : str, optional
            The checkpoint file, relative to the project.
        n_train_tiles : int
            Labelled tiles the version was trained on.
        val_iou : dict of str to float or None, optional
            Validation IoU per class name; NaN is stored as None (class absent).
        miou : float, optional
            Validation mean IoU; NaN is stored as None.
        details : dict, optional
            Anything else worth keeping (JSON-serialisable).

        Returns
        -------
        ModelVersionRecord
            The stored version (with its id).

        Raises
        ------
        ValueError
            If ``kind`` is not one of :data:`MODEL_KINDS`.
        """
        if kind not in MODEL_KINDS:
            raise ValueError(f"kind: expected one of {MODEL_KINDS}, got {kind!r}")
        clean = None if val_iou is None else {k: _finite_or_none(v) for k, v in val_iou.items()}
        with self._write() as conn:
            res = conn.execute(
                t.model_versions.insert().values(
                    kind=kind,
                    name=name,
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
            self._event(conn, "model_version", detail={"id": mid, "kind": kind, "name": name})
            return _model_row(
                conn.execute(sa.select(t.model_versions).where(t.model_versions.c.id == mid)).one()
            )

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
                for r in conn.execute(sa.select(t.model_versions).order_by(t.model_versions.c.id))
            ]

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
        q = sa.select(t.model_versions)
        if kind is not None:
            q = q.where(t.model_versions.c.kind == kind)
        with self._read() as conn:
            r = conn.execute(q.order_by(t.model_versions.c.id.desc()).limit(1)).first()
        return None if r is None else _model_row(r)
