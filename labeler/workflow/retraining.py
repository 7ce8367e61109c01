"""Retraining the proposal head on every saved mask (``labeler retrain``).

``retrain`` trains a new head on every saved full mask (accepted, amended, settled,
imported) and every weak label, and records it as a model version with its
per-class validation IoU. The tiles' pixels go to the model room as well: the head learns
a full-resolution refinement of its stride-4 proposals from them. The ``model.augment``
setting chooses how training augments (:mod:`labeler.model.train`): by default the tiles
themselves go through the encoder each epoch while there are at most 24 labelled tiles,
and the cached features are turned beyond that.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from labeler.classes import UNLABELLED
from labeler.errors import InputError, LabelerError
from labeler.imagery.read import open_image
from labeler.project import Project
from labeler.states import CONTESTED, KIND_FULL, KIND_WEAK, SETTLED
from labeler.store.records import ImageRecord, ModelVersionRecord, TileRecord
from labeler.workflow.features import encoder_and_cache, tile_features
from labeler.workflow.progress import Progress, no_progress

__all__ = ["LabelledTile", "labelled_tiles", "RetrainResult", "retrain"]


@dataclass(frozen=True)
class LabelledTile:
    """A tile with the mask training uses.

    Attributes
    ----------
    tile : TileRecord
    image : ImageRecord
        The tile's image.
    mask : ndarray, shape (H, W), uint8
        Class indices, 255 unlabelled.
    kind : {KIND_FULL, KIND_WEAK}
        A full mask or a weak label (:mod:`labeler.states`).
    """

    tile: TileRecord
    image: ImageRecord
    mask: np.ndarray
    kind: str


def labelled_tiles(project: Project) -> list[LabelledTile]:
    """Every tile with a saved mask training may use.

    A tile's newest full mask (accepted, amended, settled or imported) is used; on a
    contested tile only a reviewer's settled mask counts (the annotators' masks are in
    dispute). Tiles without a full mask use their weak labels: every weak-label save of
    the tile, by any annotator, merged, the newer save winning where two mark the same
    pixel.

    Parameters
    ----------
    project : Project
        An open project.

    Returns
    -------
    list of LabelledTile
        In tile order; tiles whose mask is all unlabelled are left out.
    """
    store = project.store
    images = {im.id: im for im in store.images()}
    out = []
    newest_full: dict[int, object] = {}
    weak: dict[int, list] = {}
    for a in store.annotations(kind=None):  # oldest first: later rows win
        if a.kind == KIND_FULL:
            newest_full[a.tile_id] = a
        else:
            weak.setdefault(a.tile_id, []).append(a)
    for t in store.tiles():
        ann = newest_full.get(t.id)
        if t.state == CONTESTED:
            ann = None
        if t.state == SETTLED:
            settled = [
                a for a in store.annotation_history(t.id) if a.state == SETTLED and a.kind == KIND_FULL
            ]
            ann = settled[-1] if settled else ann
        kind = KIND_FULL
        if ann is not None:
            mask = ann.mask()
        elif t.id in weak:
            kind = KIND_WEAK
            mask = np.full(t.shape, UNLABELLED, np.uint8)
            for a in weak[t.id]:  # oldest first: a newer save overwrites where it marks
                m = a.mask()
                mask[m != UNLABELLED] = m[m != UNLABELLED]
        else:
            continue
        if (mask == UNLABELLED).all():
            continue
        out.append(LabelledTile(tile=t, image=images[t.image_id], mask=mask, kind=kind))
    return out


@dataclass(frozen=True)
class RetrainResult:
    """What ``labeler retrain`` did."""

    model_version: ModelVersionRecord
    n_full: int
    n_weak: int
    n_train: int
    n_val: int
    best_epoch: int
    mode: str
    history: list[dict] = field(default_factory=list)


def retrain(project: Project, *, progress: Progress = no_progress) -> RetrainResult:
    """Train a new head on every saved mask and record it as a model version.

    The head's checkpoint is written to ``<project>/models/head-<n>.pt``.

    Parameters
    ----------
    project : Project
        An open project.
    progress : Progress
        Called as ``progress(done, total, label)``: first over the tiles encoded, then
        over the training epochs (with the validation mIoU).

    Returns
    -------
    RetrainResult
        The new model version with its per-class validation IoU, the numbers of tiles
        used, the best epoch and the training history.

    Raises
    ------
    LabelerError
        When there are fewer labelled tiles than the ``model.min_labelled_tiles``
        setting (the message says how many more are needed).
    """
    from labeler.model.checkpoint import save_checkpoint
    from labeler.model.train import train_head

    settings = project.settings
    schema = settings.classes
    items = labelled_tiles(project)
    need = settings.model.min_labelled_tiles
    if len(items) < need:
        raise LabelerError(
            f"retrain needs at least {need} labelled tiles (the model.min_labelled_tiles setting), found "
            f"{len(items)}; accept or correct {need - len(items)} more tiles first"
        )
    encoder, cache = encoder_and_cache(project)
    feats: list = [None] * len(items)
    pixels: list = [None] * len(items)
    by_image: dict[int, list[int]] = {}
    for i, it in enumerate(items):
        by_image.setdefault(it.image.id, []).append(i)
    done = 0
    for idx in by_image.values():
        image = items[idx[0]].image
        with open_image(project.image_path(image)) as reader:
            got = tile_features(cache, encoder, reader, image, [items[i].tile for i in idx])
            for i in idx:
                pixels[i] = reader.read(items[i].tile.window)
        for i, f in zip(idx, got, strict=True):
            feats[i] = f
        done += len(idx)
        progress(done, len(items), "encoding labelled tiles")
    n_epochs = settings.model.epochs

    def on_epoch(epoch: int, total: int, metrics: dict) -> None:
        miou = metrics.get("val_miou")
        label = f"epoch {epoch}/{total}" + (
            "" if miou is None or math.isnan(miou) else f", val mIoU {miou:.3f}"
        )
        progress(epoch, total, label)

    try:
        result = train_head(
            [it.mask for it in items],
            class_indices=schema.indices,
            features=feats,
            images=pixels,
            encoder=encoder,
            settings=settings.model,
            mode=settings.model.augment,
            progress=on_epoch,
        )
    except InputError as exc:
        raise LabelerError(str(exc)) from None
    store = project.store
    n = len([m for m in store.model_versions() if m.kind == "head"]) + 1
    name = f"head-{n}"
    ckpt = project.models_dir / f"{name}.pt"
    val = {
        c.name: (None if math.isnan(v) else float(v))
        for c, v in zip(schema.classes, result.val_iou, strict=True)
    }
    finite = [v for v in val.values() if v is not None]
    miou = float(np.mean(finite)) if finite else None
    save_checkpoint(
        ckpt,
        result.head,
        encoder_version=encoder.version,
        val_iou=result.val_iou,
        extra={"name": name, "n_train": result.n_train, "n_val": result.n_val},
    )
    mv = store.add_model_version(
        kind="head",
        name=name,
        encoder_version=encoder.version,
        checkpoint=str(ckpt.relative_to(project.root)),
        n_train_tiles=result.n_train,
        val_iou=val,
        miou=miou,
        details={
            "best_epoch": result.best_epoch,
            "mode": result.mode,
            "n_val": result.n_val,
            "full_tiles": sum(it.kind == KIND_FULL for it in items),
            "weak_tiles": sum(it.kind == KIND_WEAK for it in items),
            "epochs_max": n_epochs,
            "refine_channels": result.head.config.refine_channels,
        },
    )
    return RetrainResult(
        model_version=mv,
        n_full=sum(it.kind == KIND_FULL for it in items),
        n_weak=sum(it.kind == KIND_WEAK for it in items),
        n_train=result.n_train,
        n_val=result.n_val,
        best_epoch=result.best_epoch,
        mode=result.mode,
        history=list(result.history),
    )
