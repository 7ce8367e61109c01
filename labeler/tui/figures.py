"""Texts of the agreement and model screens (plain Python; no textual here)."""

from __future__ import annotations

import math
from collections.abc import Sequence
from datetime import UTC

from labeler.agreement import AgreementSummary, landis_koch_band
from labeler.classes import ClassSchema
from labeler.tui.rows import format_number, format_who
from labeler.workflow.annotating import QueueRow
from labeler.workflow.views import ModelVersionRecord

__all__ = [
    "AGREEMENT_COLUMNS",
    "CONTESTED_COLUMNS",
    "agreement_cells",
    "contested_cells",
    "model_columns",
    "model_cells",
    "miou_series",
]

#: Column headings of the agreement table.
AGREEMENT_COLUMNS = ("pair", "class", "kappa", "band", "IoU", "images")
#: Column headings of the contested tiles table.
CONTESTED_COLUMNS = ("tile", "image", "at", "agreement", "saved by")


def agreement_cells(summary: AgreementSummary, *, schema: ClassSchema) -> list[tuple[str, ...]]:
    """Rows of the agreement table, in :data:`AGREEMENT_COLUMNS` order.

    One block per annotator pair, then one for all pairs pooled: first a row for all
    classes (Cohen's kappa of the pooled confusion matrix, its Landis & Koch band, mean
    IoU), then one row per class (one-vs-rest kappa, IoU). Figures have 3 decimals;
    undefined ones are ``"-"``. The pair name is written on the block's first row only.

    Parameters
    ----------
    summary : AgreementSummary
        The project's agreement figures (:func:`labeler.workflow.agreement_summary`).
    schema : ClassSchema
        The project's classes; must be those of the summary.

    Returns
    -------
    list of tuple of str
        The table rows.

    Raises
    ------
    ValueError
        If the summary was made with other classes than ``schema``.
    """
    if tuple(summary.class_indices) != tuple(schema.indices):
        raise ValueError(
            f"schema: classes {schema.indices} differ from the summary's "
            f"{tuple(summary.class_indices)}; pass the project's schema"
        )
    out: list[tuple[str, ...]] = []
    blocks = [(p.label, p) for p in summary.pairs]
    if summary.pairs:
        blocks.append(("all pairs", summary.overall))
    for label, p in blocks:
        out.append(
            (label, "all", format_number(p.kappa), p.band, format_number(p.mean_iou),
             str(p.images_compared))
        )
        for c in schema:
            kappa = float(p.class_kappa[c.index])
            out.append(
                ("", c.name, format_number(kappa), landis_koch_band(kappa),
                 format_number(float(p.iou[c.index])), str(p.images_compared))
            )
    return out


def contested_cells(row: QueueRow) -> tuple[str, ...]:
    """One row of the contested tiles table, in :data:`CONTESTED_COLUMNS` order.

    Parameters
    ----------
    row : QueueRow
        A contested tile's queue row.

    Returns
    -------
    tuple of str
        Tile id, image, position, agreement (3 decimals or ``"-"``), who saved it.
    """
    return (
        str(row.tile_id),
        row.image,
        f"r{row.row} c{row.col}",
        format_number(row.agreement),
        format_who(row),
    )


def model_columns(schema: ClassSchema) -> tuple[str, ...]:
    """Column headings of the model table: one validation IoU column per class.

    Parameters
    ----------
    schema : ClassSchema
        The project's classes.

    Returns
    -------
    tuple of str
        Version, kind, when made, training tiles, ``<class> IoU`` per class, mIoU.
    """
    return ("version", "kind", "made (UTC)", "tiles", *(f"{n} IoU" for n in schema.names), "mIoU")


def model_cells(
    version: ModelVersionRecord, *, schema: ClassSchema, label: str | None = None
) -> tuple[str, ...]:
    """One row of the model table, in :func:`model_columns` order.

    Classes missing from ``val_iou`` (or ``None`` there: absent from the validation
    tiles) show ``"-"``, as do versions without validation figures (cold start).

    Parameters
    ----------
    version : ModelVersionRecord
        A model version (:func:`labeler.workflow.model_versions`).
    schema : ClassSchema
        The project's classes.
    label : str or None
        The version's short name (:func:`labeler.workflow.naming.model_labels`); its
        stored name when None.

    Returns
    -------
    tuple of str
        The cells; the time is shown in UTC.
    """
    iou = version.val_iou or {}
    made = "-"
    if version.created_at is not None:
        when = version.created_at
        if when.tzinfo is not None:
            when = when.astimezone(UTC)
        made = when.strftime("%Y-%m-%d %H:%M")
    return (
        version.name if label is None else label,
        version.kind,
        made,
        str(version.n_train_tiles),
        *(format_number(iou.get(n)) for n in schema.names),
        format_number(version.miou),
    )


def miou_series(versions: Sequence[ModelVersionRecord]) -> list[float]:
    """mIoU of every version that has one, oldest first (for the trend line).

    Parameters
    ----------
    versions : sequence of ModelVersionRecord
        Model versions, oldest first.

    Returns
    -------
    list of float
        The finite validation mIoU values, in order.
    """
    out = []
    for v in versions:
        if v.miou is not None and not math.isnan(float(v.miou)):
            out.append(float(v.miou))
    return out
